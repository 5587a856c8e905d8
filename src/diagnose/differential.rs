//! Differential diagnosis: which catalogued faults reproduce a kernel's outputs.
//!
//! For a failing case, every fault whose variant applies runs on the same inputs.
//! Each variant's outputs are compared with the kernel's element by element at the
//! case's own tolerances (the larger of the analytic bound and the baseline allowance,
//! widened to the variant's magnitude: docs/faults.md, "How a fault is matched"):
//!
//! - *explains*: every element of every output agrees with the variant;
//! - otherwise three numbers that compare across variants: the share of the
//!   over-budget elements the variant reproduces, the share of the within-budget
//!   elements it gets wrong, and the distance from the kernel to the variant relative
//!   to the distance from the kernel to the reference (both in tolerance units).
//!
//! Variants that change nothing on the case (within its budgets) are not candidates.
//! Precision faults ([`Matching::ErrorSize`]) are matched by the size of the error
//! only, and only while the variant's own error is small beside the values. When no
//! single fault explains a case, pairs of the best partial matches are tried together.

use std::collections::BTreeMap;

use ndarray::ArrayD;

use super::{catalogue, Fault, FaultKind, Matching};
use crate::budget::Budgets;
use crate::case::{Arrays, Case, Output, Visibility};
use crate::math::Dtype;
use crate::reference::{variant_outputs, Outputs};
use crate::variant::Both;

/// What a diagnosis needs of one case: the case, its inputs (as the reference reads
/// them), the expected outputs, the budgets the kernel was judged by, and the dtype it
/// computes in.
#[derive(Debug, Clone, Copy)]
pub struct CaseEvidence<'a> {
    /// The case.
    pub case: &'a Case,
    /// Its inputs.
    pub inputs: &'a Arrays,
    /// The reference outputs.
    pub expected: &'a Outputs,
    /// The budgets the kernel's outputs were compared with.
    pub budgets: &'a Budgets,
    /// The dtype the kernel computes the case in.
    pub dtype: Dtype,
}

/// How well one fault reproduces a kernel's outputs on one case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Candidate {
    /// The fault's id.
    pub fault: &'static str,
    /// Every element agrees with the variant (for a precision fault: the error has
    /// the variant's size).
    pub explains: bool,
    /// Share of the over-budget elements the variant reproduces.
    pub reproduced: f64,
    /// Share of the within-budget elements the variant gets wrong.
    pub contradicted: f64,
    /// Root-mean-square distance from the kernel to the variant over the one to the
    /// reference, in tolerance units (0: identical; 1: no closer than the reference).
    pub distance: f64,
}

/// The conclusion for one case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Finding {
    /// These faults each reproduce every output within budget (more than one: the
    /// case cannot tell them apart), best first.
    Explained {
        /// Fault ids.
        faults: Vec<&'static str>,
    },
    /// No single fault explains the outputs; these two together do.
    Combined {
        /// Fault ids.
        faults: Vec<&'static str>,
    },
    /// No fault or pair explains everything; these reproduce most of the over-budget
    /// elements and contradict almost none of the others.
    Partial {
        /// Fault ids.
        faults: Vec<&'static str>,
    },
    /// No catalogued fault explains the outputs.
    Unexplained,
}

/// The diagnosis of one failing case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct CaseDiagnosis {
    /// The conclusion.
    pub finding: Finding,
    /// The best candidates, ranked (at most five).
    pub candidates: Vec<Candidate>,
    /// How many variants ran (the applicable faults that change this case).
    pub tried: usize,
}

impl CaseDiagnosis {
    /// The fault ids the finding names.
    pub fn named(&self) -> &[&'static str] {
        match &self.finding {
            Finding::Explained { faults }
            | Finding::Combined { faults }
            | Finding::Partial { faults } => faults,
            Finding::Unexplained => &[],
        }
    }
}

/// Agreement of one set of outputs with another, element by element.
#[derive(Debug, Default, Clone, Copy)]
struct Agreement {
    /// Elements over budget against the reference.
    failing: usize,
    /// Of which the variant reproduces.
    reproduced: usize,
    /// Elements within budget against the reference.
    passing: usize,
    /// Of which the variant gets wrong.
    contradicted: usize,
    /// Σ (kernel - variant)² / tol'² over finite elements.
    to_variant: f64,
    /// Σ (kernel - reference)² / tol² over the same elements.
    to_reference: f64,
    /// Largest |kernel - reference| / tol.
    kernel_error: f64,
    /// Largest |variant - reference| / tol.
    variant_error: f64,
    /// Elements where the variant itself is over budget against the reference.
    variant_failing: usize,
    /// Elements compared.
    elements: usize,
    /// Σ (variant - reference)² and Σ reference² over finite elements: how large the
    /// variant's own error is beside the values.
    variant_power: [f64; 2],
    /// Sums for the correlation of `x = ln(1 + |kernel - reference| / tol)` and
    /// `y = ln(1 + |variant - reference| / tol)`: n, Σx, Σy, Σxx, Σyy, Σxy.
    moments: [f64; 6],
    /// The same sums for the signed errors `(kernel - reference) / tol` and
    /// `(variant - reference) / tol`.
    signed: [f64; 6],
}

fn pearson([n, sx, sy, sxx, syy, sxy]: [f64; 6]) -> f64 {
    if n < 2.0 {
        return 0.0;
    }
    let cov = sxy - sx * sy / n;
    let vx = sxx - sx * sx / n;
    let vy = syy - sy * sy / n;
    if vx <= 0.0 || vy <= 0.0 {
        0.0
    } else {
        cov / (vx * vy).sqrt()
    }
}

impl Agreement {
    /// Pearson correlation of the kernel's and the variant's signed errors.
    fn signed_correlation(&self) -> f64 {
        pearson(self.signed)
    }

    /// Pearson correlation of the kernel's and the variant's error sizes, element by
    /// element (0 when either is constant).
    fn correlation(&self) -> f64 {
        pearson(self.moments)
    }
}

/// Whether `got` agrees with `want` within `tol`, for one element: masked scores
/// (`-inf`) agree with `-inf` or a large negative sentinel, NaN only with NaN.
fn agrees(want: f64, got: f64, tol: f64) -> bool {
    if want.is_nan() {
        return got.is_nan();
    }
    if want == f64::NEG_INFINITY {
        return got == f64::NEG_INFINITY || got <= -1e4;
    }
    if want.is_infinite() {
        return got == want;
    }
    got.is_finite() && (got - want).abs() <= tol
}

/// The relative widening of the tolerance at a variant's values: `8·sqrt(n)·u` of the
/// kernel's dtype for a reduction of length `n` (a kernel computing the variant rounds
/// around its values, not the reference's).
fn relative_slack(case: &Case, output: Output, dtype: Dtype) -> f64 {
    let n = crate::reference::reduction_length(case, output) as f64;
    let u = if dtype == Dtype::F64 {
        Dtype::F64.unit_roundoff()
    } else {
        dtype.unit_roundoff()
    };
    8.0 * n.sqrt() * u
}

/// The tolerances of one output: against the reference, the case's own (0 on masked
/// probabilities, which must be exactly 0, as in the comparison); against a variant,
/// widened to the variant's magnitude.
struct Tolerances<'a> {
    budget: &'a crate::budget::Budget,
    allowance: f64,
    /// `[H, L, K]` outputs whose masked entries follow the case's visibility.
    masked: Option<Visibility>,
    probabilities: bool,
    /// Per row (last axis): the relative tolerance a variant's value gets.
    relative: Vec<f64>,
    /// Per row: the largest tolerance of a visible element (masked scores a variant
    /// uncovers are compared with it).
    row_largest: Vec<f64>,
    row: usize,
    /// Half the smallest positive value of the kernel's dtype: a variant's value below
    /// it is 0 in the kernel.
    underflow: f64,
}

impl<'a> Tolerances<'a> {
    fn new(
        evidence: &CaseEvidence<'_>,
        output: Output,
        want: &ArrayD<f64>,
        budget: &'a crate::budget::Budget,
    ) -> Self {
        let allowance = budget.allowance();
        let key_indexed = output.is_key_indexed()
            && want.ndim() == 3
            && evidence.case.operation.kind().is_window();
        let masked = key_indexed.then(|| Visibility::of(evidence.case));
        let slack = relative_slack(evidence.case, output, evidence.dtype);
        let row = want.shape().last().copied().unwrap_or(1).max(1);
        let want_s = want.as_standard_layout();
        let values = want_s.as_slice().unwrap_or(&[]);
        let hidden = |n: usize| masked.as_ref().is_some_and(|m| m.hidden(n));
        let mut relative = Vec::new();
        let mut row_largest = Vec::new();
        for (r, chunk) in values.chunks(row).enumerate() {
            // The reference's largest relative tolerance along the row, applied to the
            // variant's values: a softmax row with large scores allows a larger
            // relative error wherever the variant moves the probability.
            // Only values within a factor 100 of the row's largest count: the bound of a
            // tiny value is mostly its absolute floor, not a relative error. Capped at
            // 10%, where a variant would stop being told apart from its neighbours.
            let row_max = chunk
                .iter()
                .enumerate()
                .filter(|&(c, w)| !hidden(r * row + c) && w.is_finite())
                .fold(0.0f64, |m, (_, w)| m.max(w.abs()));
            let mut rel = 0.0f64;
            let mut largest = 0.0f64;
            for (c, w) in chunk.iter().enumerate() {
                let n = r * row + c;
                if hidden(n) || !w.is_finite() {
                    continue;
                }
                let bound = budget.analytic_at(n);
                largest = largest.max(bound.max(allowance));
                if w.abs() > allowance && w.abs() >= 0.01 * row_max {
                    rel = rel.max(bound / w.abs());
                }
            }
            // A fully masked row has no tolerance of its own to borrow: a variant that
            // uncovers keys there is matched at the cap (the reference's row is all
            // zeros, so anything the kernel shows there is the variant's or nobody's).
            let visible = (0..chunk.len()).any(|c| !hidden(r * row + c) && chunk[c].is_finite());
            if !visible {
                rel = 0.1;
            }
            relative.push(slack.max(rel.min(0.1)));
            row_largest.push(largest);
        }
        Tolerances {
            budget,
            allowance,
            masked,
            probabilities: output == Output::Probs,
            relative,
            row_largest,
            row,
            underflow: match evidence.dtype {
                Dtype::F16 => 2f64.powi(-25),
                Dtype::Bf16 => 2f64.powi(-134),
                Dtype::F32 => 2f64.powi(-150),
                _ => 0.0,
            },
        }
    }

    fn hidden(&self, n: usize) -> bool {
        self.masked.as_ref().is_some_and(|m| m.hidden(n))
    }

    /// The tolerance against the reference at element `n`.
    fn reference(&self, n: usize) -> f64 {
        if self.budget.exact || (self.probabilities && self.hidden(n)) {
            0.0
        } else if self.hidden(n) {
            self.row_largest[n / self.row]
        } else {
            self.budget.analytic_at(n).max(self.allowance)
        }
    }

    /// The tolerance against a variant whose value at `n` is `v`.
    fn variant(&self, n: usize, v: f64) -> f64 {
        if self.budget.exact {
            return 0.0;
        }
        let widened = (self.relative[n / self.row] * v.abs()).max(self.underflow);
        if self.probabilities && self.hidden(n) {
            widened
        } else {
            self.reference(n).max(widened)
        }
    }
}

/// Compares the kernel's `got` with the reference `expected` and a variant's outputs.
fn agreement(
    evidence: &CaseEvidence<'_>,
    got: &BTreeMap<Output, ArrayD<f64>>,
    variant: &Outputs,
) -> Option<Agreement> {
    let mut total = Agreement::default();
    for (output, want) in evidence.expected {
        let (Some(g), Some(v), Some(budget)) = (
            got.get(output),
            variant.get(output),
            evidence.budgets.get(output),
        ) else {
            return None;
        };
        if g.shape() != want.shape() || v.shape() != want.shape() {
            return None;
        }
        let tolerances = Tolerances::new(evidence, *output, want, budget);
        let (want_s, g_s, v_s) = (
            want.as_standard_layout(),
            g.as_standard_layout(),
            v.as_standard_layout(),
        );
        for (n, ((&w, &g), &v)) in want_s.iter().zip(g_s.iter()).zip(v_s.iter()).enumerate() {
            let tol = tolerances.reference(n);
            let tol_variant = tolerances.variant(n, v);
            let ok_reference = agrees(w, g, tol);
            let ok_variant = agrees(v, g, tol_variant);
            total.elements += 1;
            total.variant_failing += usize::from(!agrees(w, v, tol));
            if ok_reference {
                total.passing += 1;
                total.contradicted += usize::from(!ok_variant);
            } else {
                total.failing += 1;
                total.reproduced += usize::from(ok_variant);
            }
            if w.is_finite() && g.is_finite() && v.is_finite() {
                let unit = |t: f64| if t > 0.0 { t } else { f64::MIN_POSITIVE };
                total.to_variant += ((g - v) / unit(tol_variant)).powi(2);
                total.to_reference += ((g - w) / unit(tol)).powi(2);
                let (ek, ev) = ((g - w).abs() / unit(tol), (v - w).abs() / unit(tol));
                total.kernel_error = total.kernel_error.max(ek);
                total.variant_error = total.variant_error.max(ev);
                total.variant_power[0] += (v - w).powi(2);
                total.variant_power[1] += w.powi(2);
                let (x, y) = (ek.ln_1p(), ev.ln_1p());
                let (sx, sy) = ((g - w) / unit(tol), (v - w) / unit(tol));
                if sx.is_finite() && sy.is_finite() {
                    let m = &mut total.signed;
                    m[0] += 1.0;
                    m[1] += sx;
                    m[2] += sy;
                    m[3] += sx * sx;
                    m[4] += sy * sy;
                    m[5] += sx * sy;
                }
                if x.is_finite() && y.is_finite() {
                    let m = &mut total.moments;
                    m[0] += 1.0;
                    m[1] += x;
                    m[2] += y;
                    m[3] += x * x;
                    m[4] += y * y;
                    m[5] += x * y;
                }
            } else if !agrees(w, v, tol) {
                // A masked entry the variant uncovers, or a NaN it produces.
                total.variant_error = f64::INFINITY;
            }
        }
    }
    Some(total)
}

/// Whether the comparison itself fails a kernel answering `variant` (in the evidence's
/// dtype) on this case: the question a passing case asks of a fault, answered by the
/// same rules the kernel passed by (a finite sentinel carrying zero probability is a
/// valid mask, for one).
fn comparison_fails(evidence: &CaseEvidence<'_>, variant: Outputs) -> bool {
    let got = crate::kernel::outputs_in(variant, evidence.dtype);
    let options = crate::compare::CompareOptions {
        factor: evidence.budgets.values().next().map_or(2.0, |b| b.factor),
        budget_dtype: None,
        declared: Some(evidence.dtype),
        diagnose: false,
    };
    let mut source = |_: Dtype| Ok(evidence.budgets.clone());
    crate::compare::compare_with_budgets(
        evidence.case,
        evidence.inputs,
        evidence.expected,
        &got,
        &options,
        &mut source,
    )
    .map_or(true, |report| {
        report.verdict != crate::compare::Verdict::Pass
    })
}

/// Whether a variant's outputs differ from the reference anywhere beyond budget.
fn changes_case(evidence: &CaseEvidence<'_>, variant: &Outputs) -> bool {
    evidence.expected.iter().any(|(output, want)| {
        let (Some(v), Some(budget)) = (variant.get(output), evidence.budgets.get(output)) else {
            return true;
        };
        if v.shape() != want.shape() {
            return true;
        }
        let tolerances = Tolerances::new(evidence, *output, want, budget);
        let want_s = want.as_standard_layout();
        let v_s = v.as_standard_layout();
        want_s
            .iter()
            .zip(v_s.iter())
            .enumerate()
            .any(|(n, (&w, &v))| !agrees(w, v, tolerances.reference(n)))
    })
}

/// A precision variant is evidence by its error size only while its error is small
/// beside the values: root-mean-square under a tenth of theirs (squared here).
const VARIANT_POWER_RATIO: f64 = 0.01;

fn candidate(fault: &'static Fault, a: &Agreement) -> Candidate {
    let share = |part: usize, whole: usize| {
        if whole == 0 {
            0.0
        } else {
            part as f64 / whole as f64
        }
    };
    let distance = if a.to_reference > 0.0 {
        (a.to_variant / a.to_reference).sqrt()
    } else if a.to_variant > 0.0 {
        f64::INFINITY
    } else {
        0.0
    };
    let reproduces = a.failing > 0 && a.reproduced == a.failing && a.contradicted == 0;
    let explains = reproduces
        || match fault.matching {
            Matching::Values => false,
            Matching::ErrorSize => {
                // The error must have the variant's size, over as many elements, and grow
                // where the variant's grows: a rounding error is everywhere, a structured
                // mistake of the same size is not. And the variant must still resemble
                // the reference (its root-mean-square error under a tenth of the values'):
                // one that scrambles the outputs (angles of far positions in bf16) has
                // the size of any mistake that moves values as far, such as swapped
                // heads, so its size is no evidence.
                let size = a.kernel_error / a.variant_error;
                let spread = a.failing as f64 / a.variant_failing.max(1) as f64;
                let [off, power] = a.variant_power;
                a.failing > 0
                    && off < VARIANT_POWER_RATIO * power
                    && a.variant_error > 1.0
                    && (0.25..=4.0).contains(&size)
                    && (0.5..=2.0).contains(&spread)
                    && a.correlation() >= 0.5
            }
        };
    Candidate {
        fault: fault.id,
        explains,
        reproduced: share(a.reproduced, a.failing),
        contradicted: share(a.contradicted, a.passing),
        distance: if fault.matching == Matching::ErrorSize {
            (a.kernel_error / a.variant_error).ln().abs()
        } else {
            distance
        },
    }
}

/// Orders candidates: explaining ones first (equivalent conventions after mistakes
/// only when both explain), then by reproduced minus contradicted share, then by
/// distance.
fn rank(candidates: &mut [Candidate]) {
    let kind = |c: &Candidate| {
        super::fault(c.fault).map_or(FaultKind::Bug, |f| f.kind) == FaultKind::Convention
    };
    candidates.sort_by(|a, b| {
        b.explains
            .cmp(&a.explains)
            .then_with(|| {
                let score = |c: &Candidate| c.reproduced - c.contradicted;
                score(b).total_cmp(&score(a))
            })
            .then_with(|| a.distance.total_cmp(&b.distance))
            .then_with(|| kind(a).cmp(&kind(b)))
    });
}

/// Converts a kernel's arrays to f64 outputs by name.
fn outputs_of(got: &Arrays) -> BTreeMap<Output, ArrayD<f64>> {
    got.iter()
        .filter_map(|(name, t)| {
            let output = Output::ALL.into_iter().find(|o| o.name() == name)?;
            Some((output, t.view().to_owned()))
        })
        .collect()
}

/// Whether `got` is within the budgets a correct kernel computing in `dtype` gets on
/// this case (what a kernel that silently computes in `dtype` must satisfy).
fn within_budgets_of(
    evidence: &CaseEvidence<'_>,
    got: &BTreeMap<Output, ArrayD<f64>>,
    dtype: Dtype,
) -> bool {
    let factor = evidence.budgets.values().next().map_or(2.0, |b| b.factor);
    let Ok(budgets) = crate::budget::budgets(
        evidence.case,
        evidence.inputs,
        evidence.expected,
        dtype,
        factor,
    ) else {
        return false;
    };
    let narrow = CaseEvidence {
        budgets: &budgets,
        dtype,
        ..*evidence
    };
    evidence.expected.iter().all(|(output, want)| {
        let (Some(g), Some(budget)) = (got.get(output), budgets.get(output)) else {
            return false;
        };
        if g.shape() != want.shape() {
            return false;
        }
        let tolerances = Tolerances::new(&narrow, *output, want, budget);
        let (want_s, g_s) = (want.as_standard_layout(), g.as_standard_layout());
        want_s
            .iter()
            .zip(g_s.iter())
            .enumerate()
            .all(|(n, (&w, &g))| agrees(w, g, tolerances.reference(n)))
    })
}

/// Diagnoses one case the kernel failed: which catalogued faults reproduce `got`.
pub fn diagnose_case(evidence: &CaseEvidence<'_>, got: &Arrays) -> CaseDiagnosis {
    let got = outputs_of(got);
    let mut candidates = Vec::new();
    let mut partial: Vec<&'static Fault> = Vec::new();
    for fault in catalogue() {
        if !fault.variant.applies(evidence.case) {
            continue;
        }
        let Ok(outputs) = variant_outputs(
            evidence.case,
            evidence.inputs,
            evidence.dtype,
            fault.variant,
        ) else {
            continue;
        };
        if !changes_case(evidence, &outputs) {
            continue;
        }
        let Some(a) = agreement(evidence, &got, &outputs) else {
            continue;
        };
        let mut c = candidate(fault, &a);
        if c.explains && !c.reproduced.eq(&1.0) {
            if let Some(narrow) = fault.variant.computes_in(evidence.case, evidence.dtype) {
                c.explains = within_budgets_of(evidence, &got, narrow);
            } else if fault.variant.deterministic_error() {
                // The same rounding of the same quantities: the errors agree in sign too,
                // which a structured mistake of the same size does not.
                c.explains = a.signed_correlation() >= 0.5;
            }
        }
        if !c.explains && c.reproduced > 0.0 && fault.matching == Matching::Values {
            partial.push(fault);
        }
        candidates.push(c);
    }
    let tried = candidates.len();
    rank(&mut candidates);
    let explaining: Vec<&'static str> = candidates
        .iter()
        .filter(|c| c.explains)
        .map(|c| c.fault)
        .collect();
    let finding = if !explaining.is_empty() {
        Finding::Explained { faults: explaining }
    } else if let Some(pair) = explaining_pair(evidence, &got, &candidates, &partial) {
        Finding::Combined {
            faults: pair.to_vec(),
        }
    } else {
        let partial: Vec<&'static str> = candidates
            .iter()
            .filter(|c| c.reproduced >= 0.5 && c.contradicted <= 0.01 && c.distance < 1.0)
            .take(2)
            .map(|c| c.fault)
            .collect();
        if partial.is_empty() {
            Finding::Unexplained
        } else {
            Finding::Partial { faults: partial }
        }
    };
    candidates.truncate(5);
    CaseDiagnosis {
        finding,
        candidates,
        tried,
    }
}

/// The first pair of the best partial matches whose combined variant explains `got`.
fn explaining_pair(
    evidence: &CaseEvidence<'_>,
    got: &BTreeMap<Output, ArrayD<f64>>,
    ranked: &[Candidate],
    partial: &[&'static Fault],
) -> Option<[&'static str; 2]> {
    let best: Vec<&'static Fault> = ranked
        .iter()
        .filter_map(|c| partial.iter().copied().find(|f| f.id == c.fault))
        .take(4)
        .collect();
    for (n, a) in best.iter().enumerate() {
        for b in &best[n + 1..] {
            let both = Both(a.variant, b.variant);
            let Ok(outputs) =
                variant_outputs(evidence.case, evidence.inputs, evidence.dtype, &both)
            else {
                continue;
            };
            let Some(agreement) = agreement(evidence, got, &outputs) else {
                continue;
            };
            if agreement.failing > 0
                && agreement.reproduced == agreement.failing
                && agreement.contradicted == 0
            {
                return Some([a.id, b.id]);
            }
        }
    }
    None
}

/// One fault across a run.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct RunCandidate {
    /// The fault's id.
    pub fault: &'static str,
    /// The failing cases it explains (alone or as one of a pair).
    pub explains: Vec<String>,
    /// The diagnosed failing cases it does not explain.
    pub misses: Vec<String>,
    /// Passing cases it would have failed: evidence the kernel does not have it.
    pub contradicted_by: Vec<String>,
}

/// The faults that explain a run's failures, best first.
#[derive(Debug, Clone, PartialEq, Default, serde::Serialize)]
pub struct RunDiagnosis {
    /// Failing cases diagnosed.
    pub diagnosed: usize,
    /// The candidates, best first: most failing cases explained, then fewest passing
    /// cases contradicting, then catalogue order.
    pub ranked: Vec<RunCandidate>,
}

impl RunDiagnosis {
    /// Every candidate that explains every diagnosed failure with no passing case
    /// against it.
    pub fn complete(&self) -> Vec<&RunCandidate> {
        self.ranked
            .iter()
            .filter(|c| {
                c.misses.is_empty() && c.contradicted_by.is_empty() && !c.explains.is_empty()
            })
            .collect()
    }

    /// The one candidate that explains every diagnosed failure with no passing case
    /// against it; `None` when there is none, or more than one (see [`Self::tied`]).
    pub fn conclusive(&self) -> Option<&RunCandidate> {
        match self.complete().as_slice() {
            [only] => Some(only),
            _ => None,
        }
    }

    /// Two or more faults that each explain every diagnosed failure with no passing
    /// case against them: the evidence cannot tell them apart (empty otherwise).
    pub fn tied(&self) -> Vec<&'static str> {
        let complete = self.complete();
        if complete.len() < 2 {
            return Vec::new();
        }
        complete.iter().map(|c| c.fault).collect()
    }
}

/// Combines the diagnoses of a run's failing cases. Check the cases that passed with
/// [`RunDiagnosis::check_passing`] (a passing case a fault's variant would have failed
/// is evidence against it), then [`RunDiagnosis::finish`].
pub fn diagnose_run(failing: &[(String, CaseDiagnosis)]) -> RunDiagnosis {
    let mut by_fault: BTreeMap<&'static str, RunCandidate> = BTreeMap::new();
    for (id, diagnosis) in failing {
        if matches!(diagnosis.finding, Finding::Partial { .. }) {
            continue;
        }
        for &fault in diagnosis.named() {
            by_fault
                .entry(fault)
                .or_insert_with(|| RunCandidate {
                    fault,
                    explains: Vec::new(),
                    misses: Vec::new(),
                    contradicted_by: Vec::new(),
                })
                .explains
                .push(id.clone());
        }
    }
    for candidate in by_fault.values_mut() {
        candidate.misses = failing
            .iter()
            .filter(|(id, _)| !candidate.explains.contains(id))
            .map(|(id, _)| id.clone())
            .collect();
    }
    let mut run = RunDiagnosis {
        diagnosed: failing.len(),
        ranked: by_fault.into_values().collect(),
    };
    run.finish();
    run
}

impl RunDiagnosis {
    /// Whether any candidate can show on `case` (only such passing cases are worth
    /// checking).
    pub fn needs(&self, case: &Case) -> bool {
        self.ranked
            .iter()
            .any(|c| super::fault(c.fault).is_some_and(|f| f.variant.applies(case)))
    }

    /// Records, for a case the kernel passed, every candidate whose variant would have
    /// failed it.
    pub fn check_passing(&mut self, evidence: &CaseEvidence<'_>) {
        for candidate in &mut self.ranked {
            let Some(fault) = super::fault(candidate.fault) else {
                continue;
            };
            if !fault.variant.applies(evidence.case) {
                continue;
            }
            if let Ok(outputs) = variant_outputs(
                evidence.case,
                evidence.inputs,
                evidence.dtype,
                fault.variant,
            ) {
                if comparison_fails(evidence, outputs) {
                    candidate.contradicted_by.push(evidence.case.id.clone());
                }
            }
        }
    }

    /// Orders the candidates: most failing cases explained, then fewest passing cases
    /// contradicting, then catalogue order.
    pub fn finish(&mut self) {
        let order = |id: &str| {
            catalogue()
                .iter()
                .position(|f| f.id == id)
                .unwrap_or(usize::MAX)
        };
        self.ranked.sort_by(|a, b| {
            b.explains
                .len()
                .cmp(&a.explains.len())
                .then_with(|| a.contradicted_by.len().cmp(&b.contradicted_by.len()))
                .then_with(|| order(a.fault).cmp(&order(b.fault)))
        });
    }
}
