//! The self-test of the suite's power: every catalogued fault planted in an otherwise
//! correct kernel, run through a suite and a fixed fuzz budget, with what caught it and
//! what the diagnosis named.

use std::time::Instant;

use crate::case::{Arrays, Case};
use crate::compare::Verdict;
use crate::diagnose::{catalogue, Fault};
use crate::error::Result;
use crate::kernel::{full_support, outputs_in, Answer, Kernel, KernelInfo};
use crate::math::Dtype;
use crate::reference::{baseline, expected, variant_outputs};
use crate::variant::{Both, Deviation};

use super::check::{check, CheckOptions};

/// A kernel that is correct in every dtype (the same-precision reference) except for
/// one catalogued fault.
pub struct PlantedKernel {
    fault: &'static Fault,
}

impl PlantedKernel {
    /// The kernel with `fault` planted.
    pub fn new(fault: &'static Fault) -> Self {
        PlantedKernel { fault }
    }
}

/// A kernel at the edge of the numerical contract of `dtype`: stages rounded to it,
/// angles in f32 (what the same-precision baseline does).
struct AtPrecision(Dtype);

impl Deviation for AtPrecision {
    fn stage(&self, _case: &Case, _dtype: Dtype) -> Option<Dtype> {
        (self.0 != Dtype::F64).then_some(self.0)
    }

    fn angles(&self, _case: &Case, _dtype: Dtype) -> Option<Dtype> {
        (self.0 != Dtype::F64).then_some(Dtype::F32)
    }
}

impl Kernel for PlantedKernel {
    fn describe(&mut self) -> Result<KernelInfo> {
        Ok(KernelInfo {
            name: format!("planted {}", self.fault.id),
            version: env!("CARGO_PKG_VERSION").into(),
            supports: full_support(),
            dtypes: vec![Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16],
            conventions: Vec::new(),
        })
    }

    fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
        let planted = Both(self.fault.variant, &AtPrecision(dtype));
        let outputs = if self.fault.variant.applies(case) {
            variant_outputs(case, inputs, dtype, &planted).ok()
        } else {
            None
        };
        // Where the mistake cannot occur (or its variant is undefined), the kernel is
        // the correct one.
        let outputs = match outputs {
            Some(o) => o,
            None if dtype == Dtype::F64 => expected(case, inputs)?,
            None => baseline(case, inputs, dtype)?,
        };
        Ok(Answer::Outputs {
            outputs: outputs_in(outputs, dtype),
            elapsed_ms: None,
        })
    }
}

/// What the self-test found for one fault.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct PlantedResult {
    /// The fault's id.
    pub fault: &'static str,
    /// The first suite case that failed, or the minimal case of the first failing
    /// random case; `None` when nothing failed.
    pub detected_by: Option<String>,
    /// Failing suite cases.
    pub failing_suite_cases: usize,
    /// Failing random cases.
    pub failing_random_cases: usize,
    /// The run diagnosis's best candidate.
    pub named: Option<&'static str>,
    /// Whether that is the planted fault.
    pub top1: bool,
    /// Whether the best candidate explains every diagnosed failure and no passing case
    /// contradicts it.
    pub conclusive: bool,
    /// Seconds the run took.
    pub seconds: f64,
}

/// Plants every catalogued fault (or those whose id is in `only`) in turn and checks
/// the kernel on `cases` plus `options`' fuzzing. `progress(done, total, id)`.
pub fn plant_all(
    cases: &[Case],
    options: &CheckOptions,
    only: &[String],
    progress: &mut dyn FnMut(usize, usize, &str),
) -> Result<Vec<PlantedResult>> {
    let faults: Vec<&'static Fault> = catalogue()
        .iter()
        .filter(|f| only.is_empty() || only.iter().any(|id| id == f.id))
        .collect();
    let mut out = Vec::new();
    for (n, fault) in faults.iter().enumerate() {
        progress(n, faults.len(), fault.id);
        out.push(plant(fault, cases, options)?);
    }
    progress(faults.len(), faults.len(), "");
    Ok(out)
}

/// Plants one fault and checks the kernel.
pub fn plant(
    fault: &'static Fault,
    cases: &[Case],
    options: &CheckOptions,
) -> Result<PlantedResult> {
    let started = Instant::now();
    let mut kernel = PlantedKernel::new(fault);
    let outcome = check(&mut kernel, cases, options, &mut |_, _, _| {})?;
    let report = &outcome.report;
    let failed = |random: bool| {
        report
            .cases
            .iter()
            .filter(|c| c.verdict == Verdict::Fail && report.random.contains(&c.case) == random)
            .count()
    };
    let detected_by = report
        .cases
        .iter()
        .find(|c| c.verdict == Verdict::Fail && !report.random.contains(&c.case))
        .map(|c| c.case.clone())
        .or_else(|| outcome.minimal.first().map(|m| m.case.id.clone()));
    let named = report
        .diagnosis
        .as_ref()
        .and_then(|d| d.ranked.first())
        .map(|c| c.fault);
    let conclusive = report
        .diagnosis
        .as_ref()
        .and_then(|d| d.conclusive())
        .is_some_and(|c| c.fault == fault.id);
    Ok(PlantedResult {
        fault: fault.id,
        detected_by,
        failing_suite_cases: failed(false),
        failing_random_cases: failed(true),
        named,
        top1: named == Some(fault.id),
        conclusive,
        seconds: started.elapsed().as_secs_f64(),
    })
}
