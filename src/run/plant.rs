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
use crate::report::PlantedResult;

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

/// Random cases per planted fault in the self-test (and the docs page).
pub const DEFAULT_FUZZ: usize = 40;

/// The check options of the self-test: `fuzz` random cases with `seed`, a small shrink
/// budget, nothing saved.
pub fn options(fuzz: usize, seed: u64) -> CheckOptions {
    CheckOptions {
        fuzz_cases: fuzz,
        seed,
        shrink_budget: 60,
        save_dir: None,
        ..CheckOptions::default()
    }
}

/// The command line that reproduces a self-test run (for the docs page).
pub fn command(suite: &str, fuzz: usize, seed: u64) -> String {
    let mut c = "posconform plant --format markdown --out docs/faults.md".to_string();
    if suite != "core" {
        c += &format!(" --suite {suite}");
    }
    if fuzz != DEFAULT_FUZZ {
        c += &format!(" --fuzz {fuzz}");
    }
    if seed != 0x5eed {
        c += &format!(" --seed {seed}");
    }
    c
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
    // Suite cases by id; random cases as the report lists them (shrinking steps and
    // the re-run of a minimal case are neither).
    let in_suite = |id: &str| cases.iter().any(|c| c.id == id);
    let failed = |random: bool| {
        report
            .cases
            .iter()
            .filter(|c| c.verdict == Verdict::Fail)
            .filter(|c| {
                if random {
                    let step = c.case.contains(".shrink") || c.case.ends_with(".minimal");
                    report.random.contains(&c.case) && !step
                } else {
                    in_suite(&c.case)
                }
            })
            .count()
    };
    let detected_by = report
        .cases
        .iter()
        .find(|c| c.verdict == Verdict::Fail && in_suite(&c.case))
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

/// The docs page of the catalogue (docs/faults.md): every fault with its smallest
/// example among `suite`'s cases, and the self-test table of this many random cases
/// per fault with this seed; with the results.
pub fn catalogue_page(
    suite: &str,
    fuzz: usize,
    seed: u64,
    progress: &mut dyn FnMut(usize, usize, &str),
) -> Result<(String, Vec<PlantedResult>)> {
    let cases = crate::suite::suite(suite)?;
    let results = plant_all(&cases, &options(fuzz, seed), &[], progress)?;
    let examples: Vec<_> = catalogue()
        .iter()
        .map(|f| (f.id, crate::diagnose::example(f, &cases, 6)))
        .collect();
    let page = crate::report::explain::catalogue_markdown(
        &results,
        &command(suite, fuzz, seed),
        &examples,
    );
    Ok((page, results))
}
