//! Comparison of a kernel's outputs with the expected ones: budgets, error statistics
//! and the mismatch report. A mismatch is a result (a value in a [`CaseReport`]), not
//! an error.
//!
//! Budgets (docs/budgets.md), per output array, for the dtype the kernel declares:
//! - *analytic*: the per-element bound of [`crate::reference::analytic_bounds`],
//!   derived from the numerical contract for every output;
//! - *baseline*: `c × max(baseline error, floor)`, where the baseline error is the
//!   largest deviation of the same-precision reference ([`crate::reference::baseline`])
//!   from the f64 oracle (common practice: c = 2), and the floor `sqrt(n)·u·max|expected|`
//!   keeps an f64 budget from being zero;
//! - *exact*: integer outputs (buckets, indices) must match exactly.
//!
//! An element is within budget when its error is at most the larger of its analytic
//! bound and the baseline allowance. The report says which criterion decided.
//!
//! Masked entries are the ones the case hides (the causal mask over `[memory ; current]`
//! and the case's hidden keys), never the ones whose expected value happens to be 0: a
//! masked score passes when it is `-inf` or a finite sentinel carrying zero probability
//! in the budget dtype; a masked probability must be exactly 0. A visible probability
//! that underflows to 0 in the reference is compared like any other element (a kernel
//! may return a subnormal there).

use std::collections::BTreeMap;

use ndarray::{ArrayD, Dimension};

use crate::case::{Arrays, Case, Operation};
use crate::error::Result;
use crate::math::precision::{ulp_distance, Dtype};
use crate::reference::{self, Outputs};

/// How to compare.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct CompareOptions {
    /// `c`: how many times the baseline's error a kernel may make.
    pub factor: f64,
    /// Derive budgets for this dtype instead of the one the kernel declares.
    pub budget_dtype: Option<Dtype>,
    /// The dtype the kernel computes in for this case (what it was asked for and
    /// declared in its handshake). Budgets follow it whatever dtype the returned arrays
    /// carry; `None` takes each array's own dtype as the declaration (result files).
    pub declared: Option<Dtype>,
}

impl Default for CompareOptions {
    fn default() -> Self {
        CompareOptions {
            factor: 2.0,
            budget_dtype: None,
            declared: None,
        }
    }
}

/// The error budget of one output array.
#[derive(Debug, Clone, PartialEq)]
pub struct Budget {
    /// The dtype the budget was derived for.
    pub dtype: Dtype,
    /// `c`.
    pub factor: f64,
    /// Largest deviation of the same-precision baseline from the oracle.
    pub baseline_error: f64,
    /// `sqrt(n)·u·max|expected|` (u of the accumulation precision).
    pub floor: f64,
    /// Per-element analytic bound, where one exists.
    pub analytic: Option<ArrayD<f64>>,
    /// Integer output: exact match required.
    pub exact: bool,
}

impl Budget {
    /// The baseline allowance `c · max(baseline error, floor)`.
    pub fn allowance(&self) -> f64 {
        if self.exact {
            0.0
        } else {
            self.factor * self.baseline_error.max(self.floor)
        }
    }

    /// The per-element tolerance: the larger of the analytic bound and the allowance.
    pub fn tolerance(&self) -> ArrayD<f64> {
        let allowance = self.allowance();
        match &self.analytic {
            Some(bound) => bound.mapv(|b| b.max(allowance)),
            None => ArrayD::from_elem(ndarray::IxDyn(&[]), allowance),
        }
    }

    fn at(&self, index: &[usize]) -> (f64, f64) {
        let analytic = self
            .analytic
            .as_ref()
            .and_then(|a| a.get(index).copied())
            .unwrap_or(0.0);
        (analytic, self.allowance())
    }
}

/// Budgets of every output of `case` for a kernel computing in `dtype`.
pub fn budgets(
    case: &Case,
    inputs: &Arrays,
    expected: &Outputs,
    dtype: Dtype,
    factor: f64,
) -> Result<BTreeMap<String, Budget>> {
    // The f64 baseline is the oracle itself: its error is 0 by construction.
    let baseline = if dtype == Dtype::F64 {
        Outputs::new()
    } else {
        reference::baseline(case, inputs, dtype)?
    };
    let mut analytic = reference::analytic_bounds(case, inputs, dtype)?;
    let mut out = BTreeMap::new();
    for (name, want) in expected {
        let exact = crate::case::is_integer_output(name);
        let dtype = if exact { Dtype::I64 } else { dtype };
        let baseline_error = baseline
            .get(name)
            .map(|b| {
                want.iter()
                    .zip(b.iter())
                    .filter(|(w, _)| w.is_finite())
                    .map(|(w, b)| (w - b).abs())
                    .fold(0.0, f64::max)
            })
            .unwrap_or(0.0);
        let largest = want
            .iter()
            .filter(|x| x.is_finite())
            .fold(0.0f64, |m, x| m.max(x.abs()));
        // The worst case is the analytic bound's job; the floor only keeps an f64
        // baseline budget (where the baseline is the oracle itself) from being zero, so
        // it uses the probabilistic size sqrt(n)·u of a sum's rounding error (Higham and
        // Mary 2019, from memory), in the accumulation precision.
        let n = reference::reduction_length(case, name) as f64;
        let floor = n.sqrt() * crate::math::precision::accumulation_gamma(dtype, 1) * largest;
        out.insert(
            name.clone(),
            Budget {
                dtype,
                factor,
                baseline_error,
                floor,
                analytic: analytic.remove(name),
                exact,
            },
        );
    }
    Ok(out)
}

/// Which criterion accepted an output (a pass), or whose tolerance applied at the worst
/// element (a failure).
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Criterion {
    /// Every element within its analytic bound.
    Analytic,
    /// Within `c ×` the same-precision baseline's error.
    Baseline,
    /// Integer output equal element for element.
    Exact,
}

/// The masking convention seen in a kernel's masked entries.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Masking {
    /// Masked scores are `-inf`, or masked probabilities exactly 0.
    NegativeInfinity,
    /// Masked scores hold this finite value (the most positive one seen), which
    /// carries zero probability in the budget dtype.
    Sentinel {
        /// The sentinel value.
        value: f64,
    },
    /// Some masked entries carry probability (or are NaN / +inf).
    Leak {
        /// How many masked entries leak.
        count: usize,
    },
}

/// A short description of where the errors lie.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Pattern {
    /// Every over-budget element is a masked entry.
    MaskedEntriesOnly,
    /// Every over-budget element is a memory key (`j < M`).
    MemoryColumnsOnly,
    /// Every over-budget element has a distance `Δ = M + i - j` in this range.
    DistanceBand {
        /// Smallest distance with errors.
        from: i64,
        /// Largest distance with errors.
        to: i64,
    },
    /// The error grows along the position axis (last third vs first third).
    GrowsWithPosition {
        /// Ratio of the mean row-maximum errors.
        ratio: f64,
    },
    /// The kernel masks keys the query must see (`-inf` scores or zero probabilities
    /// at visible entries).
    VisibleKeysMasked {
        /// How many visible entries were masked.
        count: usize,
        /// Whether, in every query row, exactly the keys `i < j <= M + i` were masked:
        /// a causal mask aligned top-left instead of offset by the memory.
        top_left: bool,
    },
    /// Rows before this one are within budget (stream and decode: the token index).
    BeginsAtRow {
        /// First row with an element over budget.
        row: usize,
    },
}

/// The comparison of one output array.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct OutputReport {
    /// The output's name.
    pub name: String,
    /// Its shape.
    pub shape: Vec<usize>,
    /// The dtype the kernel declared for this case.
    pub dtype: Dtype,
    /// The dtype of the array the kernel returned.
    pub array_dtype: Dtype,
    /// The dtype the budget was derived for.
    pub budget_dtype: Dtype,
    /// Whether every element is within budget and no visible entry is non-finite.
    pub passed: bool,
    /// The criterion that accepted it, or (failing) whose tolerance applied at `worst`.
    pub decided_by: Criterion,
    /// Largest absolute error over compared elements.
    pub max_abs: f64,
    /// Largest relative error over elements with a non-zero expected value.
    pub max_rel: f64,
    /// Largest error in ULPs of the declared dtype.
    pub max_ulp: f64,
    /// Coordinates of the element with the largest error relative to its own
    /// tolerance.
    pub worst: Option<Vec<usize>>,
    /// `|got - expected|` at `worst`.
    pub worst_error: f64,
    /// `worst_error / worst_tolerance` (how far over or under its budget).
    pub worst_ratio: f64,
    /// Kernel value at `worst`.
    pub worst_got: f64,
    /// Expected value at `worst`.
    pub worst_expected: f64,
    /// Tolerance at `worst`.
    pub worst_tolerance: f64,
    /// Elements over budget.
    pub over_budget: usize,
    /// Elements compared (masked entries included).
    pub elements: usize,
    /// Non-finite values where a finite one was expected.
    pub non_finite: usize,
    /// The baseline allowance `c · max(baseline, floor)`.
    pub allowance: f64,
    /// Masking convention seen (scores and probabilities).
    pub masking: Option<Masking>,
    /// Where the errors lie (failing outputs).
    pub patterns: Vec<Pattern>,
    /// Per-element error over tolerance, for heatmaps (`[H, L, K]` outputs only).
    #[serde(skip)]
    pub error_map: Option<ArrayD<f64>>,
}

/// The outcome of one case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "kind", content = "reason")]
pub enum Verdict {
    /// Every output within budget.
    Pass,
    /// At least one output over budget.
    Fail,
    /// The kernel does not support this case.
    Skipped(String),
    /// The case could not be compared (missing or malformed results, kernel crash).
    Error(String),
}

/// The comparison of one case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct CaseReport {
    /// The case id.
    pub case: String,
    /// The scheme name.
    pub scheme: String,
    /// The operation name.
    pub operation: String,
    /// Fault classes the case targets.
    pub faults: Vec<u8>,
    /// `M` and `L` of the case (for labelling heatmaps).
    pub memory_len: usize,
    /// `L`.
    pub query_len: usize,
    /// The verdict.
    pub verdict: Verdict,
    /// Per-output comparisons.
    pub outputs: Vec<OutputReport>,
    /// Things the user must know before trusting the numbers.
    pub warnings: Vec<String>,
}

impl CaseReport {
    /// A report for a case that could not be compared.
    pub fn error(case: &Case, reason: impl Into<String>) -> Self {
        Self::empty(case, Verdict::Error(reason.into()))
    }

    /// A report for a vector file that could not be read (no case to name but the
    /// file's stem).
    pub fn unreadable(id: &str, reason: impl Into<String>) -> Self {
        CaseReport {
            case: id.to_string(),
            scheme: "?".into(),
            operation: "?".into(),
            faults: Vec::new(),
            memory_len: 0,
            query_len: 0,
            verdict: Verdict::Error(reason.into()),
            outputs: Vec::new(),
            warnings: Vec::new(),
        }
    }

    /// A report for a case the kernel does not support.
    pub fn skipped(case: &Case, reason: impl Into<String>) -> Self {
        Self::empty(case, Verdict::Skipped(reason.into()))
    }

    fn empty(case: &Case, verdict: Verdict) -> Self {
        CaseReport {
            case: case.id.clone(),
            scheme: case.scheme.scheme().name().to_string(),
            operation: case.operation.name().to_string(),
            faults: case.faults.clone(),
            memory_len: case.memory_len,
            query_len: case.query_len,
            verdict,
            outputs: Vec::new(),
            warnings: Vec::new(),
        }
    }
}

/// The smallest positive value of a dtype (subnormals included).
fn smallest_positive(dtype: Dtype) -> f64 {
    match dtype {
        Dtype::F64 => 5e-324,
        Dtype::F32 => f32::from_bits(1) as f64,
        Dtype::F16 => 2f64.powi(-24),
        Dtype::Bf16 => 2f64.powi(-133),
        Dtype::I64 => 1.0,
    }
}

/// Compares a kernel's `got` outputs for `case` with `expected`, deriving the budgets
/// from the case's inputs.
///
/// Structural problems (a missing output, a wrong shape or an integer dtype for a
/// float output) make the verdict [`Verdict::Error`] naming the output; extra outputs
/// are reported as warnings.
pub fn compare(
    case: &Case,
    inputs: &Arrays,
    expected: &Outputs,
    got: &Arrays,
    options: &CompareOptions,
) -> Result<CaseReport> {
    compare_with_budgets(case, expected, got, options, &mut |dtype| {
        budgets(case, inputs, expected, dtype, options.factor)
    })
}

/// Budgets of every output of a case for one dtype, on demand.
pub type BudgetSource<'a> = dyn FnMut(Dtype) -> Result<BTreeMap<String, Budget>> + 'a;

/// [`compare`] with the budgets supplied by `budgets_for` (per budget dtype; e.g. the
/// ones stored in a vector file).
pub fn compare_with_budgets(
    case: &Case,
    expected: &Outputs,
    got: &Arrays,
    options: &CompareOptions,
    budgets_for: &mut BudgetSource<'_>,
) -> Result<CaseReport> {
    let mut report = CaseReport::empty(case, Verdict::Pass);
    for name in got.keys().filter(|n| !expected.contains_key(*n)) {
        report.warnings.push(format!(
            "output `{name}` is not part of this case and was ignored"
        ));
    }
    let mut structural = Vec::new();
    let mut budget_cache: BTreeMap<Dtype, BTreeMap<String, Budget>> = BTreeMap::new();
    let visibility = Visibility::of(case);
    for (name, want) in expected {
        let Some(tensor) = got.get(name) else {
            structural.push(format!("missing output `{name}`"));
            continue;
        };
        if tensor.shape() != want.shape() {
            structural.push(format!(
                "output `{name}` has shape {:?}, expected {:?}",
                tensor.shape(),
                want.shape()
            ));
            continue;
        }
        let exact = crate::case::is_integer_output(name);
        if !exact && !tensor.dtype().is_float() {
            structural.push(format!(
                "output `{name}` is declared i64; a float dtype is expected"
            ));
            continue;
        }
        let array_dtype = tensor.dtype();
        let declared = if exact {
            array_dtype
        } else {
            options.declared.unwrap_or(array_dtype)
        };
        let budget_dtype = if exact {
            Dtype::I64
        } else {
            options.budget_dtype.unwrap_or(declared)
        };
        if !exact {
            warn_about_dtypes(
                name,
                declared,
                array_dtype,
                budget_dtype,
                tensor,
                &mut report.warnings,
            );
        }
        // Integer outputs have the same (exact) budget whatever the float dtype.
        let source_dtype = if exact {
            options
                .budget_dtype
                .or(options.declared)
                .unwrap_or(case.dtype)
        } else {
            budget_dtype
        };
        let budgets_for_dtype = match budget_cache.entry(source_dtype) {
            std::collections::btree_map::Entry::Occupied(e) => e.into_mut(),
            std::collections::btree_map::Entry::Vacant(e) => e.insert(budgets_for(source_dtype)?),
        };
        let Some(budget) = budgets_for_dtype.get(name) else {
            structural.push(format!("no budget for output `{name}`"));
            continue;
        };
        let mut output = compare_output(
            case,
            name,
            want,
            tensor.view(),
            declared,
            budget,
            &visibility,
        );
        output.array_dtype = array_dtype;
        report.outputs.push(output);
    }
    let answered: std::collections::BTreeSet<Dtype> = report
        .outputs
        .iter()
        .filter(|o| !crate::case::is_integer_output(&o.name))
        .map(|o| o.dtype)
        .collect();
    if answered.iter().any(|d| *d != case.dtype) {
        let names: Vec<&str> = answered.iter().map(|d| d.name()).collect();
        report.warnings.push(format!(
            "the case is written for {}; the kernel computes it in {}, and budgets follow that dtype",
            case.dtype,
            names.join(", ")
        ));
    }
    if !structural.is_empty() {
        report.verdict = Verdict::Error(structural.join("; "));
    } else if report.outputs.iter().any(|o| !o.passed) {
        report.verdict = Verdict::Fail;
    }
    Ok(report)
}

/// Which entries of the key-indexed outputs (`scores`, `probs` of `scores` and
/// `attention` cases) the case hides: the causal mask over `[memory ; current]` and
/// the hidden keys.
struct Visibility {
    mask: Option<ndarray::Array2<bool>>,
}

impl Visibility {
    fn of(case: &Case) -> Self {
        let mask = matches!(case.operation, Operation::Scores | Operation::Attention).then(|| {
            ndarray::Array2::from_shape_fn((case.query_len, case.key_len()), |(i, j)| {
                j <= case.memory_len + i && !case.hidden_keys.contains(&j)
            })
        });
        Visibility { mask }
    }

    /// Whether the element at `index` of `output` is hidden from its query.
    fn hidden(&self, output: &str, index: &[usize]) -> bool {
        match (&self.mask, output, index) {
            (Some(mask), "scores" | "probs", [_, i, j]) => {
                !mask.get([*i, *j]).copied().unwrap_or(true)
            }
            _ => false,
        }
    }
}

fn warn_about_dtypes(
    name: &str,
    declared: Dtype,
    array_dtype: Dtype,
    budget_dtype: Dtype,
    tensor: &crate::tensor::Tensor,
    warnings: &mut Vec<String>,
) {
    if array_dtype != declared {
        let consequence = if array_dtype.unit_roundoff() < declared.unit_roundoff() {
            String::new()
        } else {
            format!("; values rounded to {array_dtype} cannot be expected to meet it")
        };
        warnings.push(format!(
            "output `{name}` came back as {array_dtype} although the kernel computes this case in {declared}; \
             judged at the {declared} budget{consequence}"
        ));
    }
    if budget_dtype.unit_roundoff() > declared.unit_roundoff() {
        warnings.push(format!(
            "output `{name}`: tolerance derived for {budget_dtype}; your kernel claimed {declared}. \
             A pass here does not show {declared} accuracy"
        ));
    }
    // A kernel that claims a wide dtype but returns values that all fit a narrow one
    // probably computes in the narrow one.
    let finite: Vec<f64> = tensor
        .view()
        .iter()
        .copied()
        .filter(|x| x.is_finite() && *x != 0.0)
        .collect();
    if finite.len() >= 16 {
        for narrow in [Dtype::Bf16, Dtype::F16, Dtype::F32] {
            if narrow.unit_roundoff() > declared.unit_roundoff()
                && finite.iter().all(|&x| narrow.represents(x))
            {
                warnings.push(format!(
                    "output `{name}`: the kernel claimed {declared} but every value is representable in {narrow}; \
                     it may compute in {narrow}"
                ));
                break;
            }
        }
    }
}

fn compare_output(
    case: &Case,
    name: &str,
    want: &ArrayD<f64>,
    got: ndarray::ArrayViewD<'_, f64>,
    declared: Dtype,
    budget: &Budget,
    visibility: &Visibility,
) -> OutputReport {
    let is_scores = name == "scores";
    let is_probs = name == "probs";
    let mut stats = OutputReport {
        name: name.to_string(),
        shape: want.shape().to_vec(),
        dtype: declared,
        array_dtype: declared,
        budget_dtype: budget.dtype,
        passed: true,
        decided_by: if budget.exact {
            Criterion::Exact
        } else {
            Criterion::Analytic
        },
        max_abs: 0.0,
        max_rel: 0.0,
        max_ulp: 0.0,
        worst: None,
        worst_error: 0.0,
        worst_ratio: 0.0,
        worst_got: 0.0,
        worst_expected: 0.0,
        worst_tolerance: 0.0,
        over_budget: 0,
        elements: 0,
        non_finite: 0,
        allowance: budget.allowance(),
        masking: None,
        patterns: Vec::new(),
        error_map: None,
    };
    let mut error_map = ArrayD::zeros(want.raw_dim());
    let mut failing: Vec<Vec<usize>> = Vec::new();
    let mut leaks = 0;
    let mut sentinel: Option<f64> = None;
    let mut saw_mask = false;
    let mut worst_ratio = -1.0;
    let mut analytic_holds = budget.analytic.is_some();
    let row_max = scores_row_max(want, &got, is_scores, visibility);
    // A probability rounds to zero in the dtype when it is below half the smallest
    // positive value; compared as 2p < smallest, since half of f64's smallest
    // subnormal is itself 0.
    let smallest = smallest_positive(budget.dtype);
    // The worst element is the one furthest over its own tolerance; among infinite
    // ratios a visible entry is shown before a masked one (a wrong value where one is
    // expected says more than a leak).
    let mut worst_masked = false;
    let mut record_worst = |stats: &mut OutputReport,
                            ratio: f64,
                            idx: &[usize],
                            g: f64,
                            w: f64,
                            tolerance: f64,
                            masked: bool| {
        if ratio > worst_ratio || (worst_masked && !masked && ratio >= worst_ratio) {
            worst_masked = masked;
            worst_ratio = ratio;
            stats.worst = Some(idx.to_vec());
            stats.worst_got = g;
            stats.worst_expected = w;
            stats.worst_tolerance = tolerance;
            stats.worst_error = if g == w { 0.0 } else { (g - w).abs() };
            stats.worst_ratio = ratio;
        }
    };
    for (index, &w) in want.indexed_iter() {
        let idx = index.slice();
        let g = got[idx];
        stats.elements += 1;
        if (is_scores || is_probs) && (visibility.hidden(name, idx) || w == f64::NEG_INFINITY) {
            saw_mask = true;
            let ok = if is_scores {
                if g == f64::NEG_INFINITY {
                    true
                } else if g.is_finite() {
                    sentinel = Some(sentinel.map_or(g, |s: f64| s.max(g)));
                    let max = row_max
                        .get(&idx[..idx.len() - 1])
                        .copied()
                        .unwrap_or(f64::NEG_INFINITY);
                    max == f64::NEG_INFINITY || 2.0 * (g - max).exp() < smallest
                } else {
                    false
                }
            } else {
                g == 0.0
            };
            if !ok {
                if g.is_nan() || g == f64::INFINITY {
                    stats.non_finite += 1;
                }
                leaks += 1;
                error_map[idx] = f64::INFINITY;
                record_worst(&mut stats, f64::INFINITY, idx, g, w, 0.0, true);
                failing.push(idx.to_vec());
            }
            continue;
        }
        let (analytic, allowance) = budget.at(idx);
        let tolerance = analytic.max(allowance);
        if !g.is_finite() {
            // A non-finite answer where a finite one is expected is an infinite error.
            stats.max_abs = f64::INFINITY;
            stats.max_rel = f64::INFINITY;
            stats.max_ulp = f64::INFINITY;
            stats.non_finite += 1;
            error_map[idx] = f64::INFINITY;
            record_worst(&mut stats, f64::INFINITY, idx, g, w, tolerance, false);
            failing.push(idx.to_vec());
            continue;
        }
        let err = (g - w).abs();
        stats.max_abs = stats.max_abs.max(err);
        if w != 0.0 {
            stats.max_rel = stats.max_rel.max(err / w.abs());
        }
        stats.max_ulp = stats.max_ulp.max(ulp_distance(g, w, declared));
        if err > analytic {
            analytic_holds = false;
        }
        let ratio = if tolerance > 0.0 {
            err / tolerance
        } else if err > 0.0 {
            f64::INFINITY
        } else {
            0.0
        };
        error_map[idx] = ratio;
        record_worst(&mut stats, ratio, idx, g, w, tolerance, false);
        if err > tolerance {
            failing.push(idx.to_vec());
        }
    }
    stats.over_budget = failing.len();
    stats.passed = failing.is_empty();
    if !budget.exact {
        // A pass names what accepted it; a failure names the criterion whose tolerance
        // applied at the worst element (the larger of the two there).
        let analytic_governs = if stats.passed {
            analytic_holds
        } else {
            let at_worst = stats.worst.as_deref().map(|idx| budget.at(idx));
            at_worst.is_some_and(|(analytic, allowance)| analytic >= allowance)
        };
        stats.decided_by = if analytic_governs {
            Criterion::Analytic
        } else {
            Criterion::Baseline
        };
    }
    if is_scores || is_probs {
        stats.masking = Some(if leaks > 0 {
            Masking::Leak { count: leaks }
        } else if let Some(value) = sentinel {
            Masking::Sentinel { value }
        } else {
            Masking::NegativeInfinity
        });
        if !saw_mask {
            // Nothing was masked in this case: there is no convention to report.
            stats.masking = None;
        }
    }
    if !stats.passed {
        stats.patterns = patterns(
            case, name, want, &got, &failing, &error_map, leaks, visibility,
        );
    }
    if want.ndim() == 3 && (is_scores || is_probs) {
        stats.error_map = Some(error_map);
    }
    stats
}

/// Largest kernel score over the visible entries of each row (key `[h, i]`).
fn scores_row_max(
    want: &ArrayD<f64>,
    got: &ndarray::ArrayViewD<'_, f64>,
    is_scores: bool,
    visibility: &Visibility,
) -> BTreeMap<Vec<usize>, f64> {
    let mut out = BTreeMap::new();
    if !is_scores || want.ndim() == 0 {
        return out;
    }
    for (index, &w) in want.indexed_iter() {
        let idx = index.slice();
        if w.is_finite() && !visibility.hidden("scores", idx) {
            let g = got[idx];
            let entry = out
                .entry(idx[..idx.len() - 1].to_vec())
                .or_insert(f64::NEG_INFINITY);
            if g.is_finite() {
                *entry = f64::max(*entry, g);
            }
        }
    }
    out
}

/// Whether the kernel's value at `idx` is a masked one (`-inf` score, zero probability).
fn masked_in(got: &ndarray::ArrayViewD<'_, f64>, idx: &[usize], name: &str) -> bool {
    let g = got[idx];
    if name == "probs" {
        g == 0.0
    } else {
        g == f64::NEG_INFINITY || g < -1e30
    }
}

#[allow(clippy::too_many_arguments)]
fn patterns(
    case: &Case,
    name: &str,
    want: &ArrayD<f64>,
    got: &ndarray::ArrayViewD<'_, f64>,
    failing: &[Vec<usize>],
    error_map: &ArrayD<f64>,
    leaks: usize,
    visibility: &Visibility,
) -> Vec<Pattern> {
    let mut out = Vec::new();
    let window_op = matches!(case.operation, Operation::Scores | Operation::Attention);
    let key_indexed = window_op && (name == "scores" || name == "probs") && want.ndim() == 3;
    if key_indexed {
        if leaks == failing.len() {
            out.push(Pattern::MaskedEntriesOnly);
        }
        let m = case.memory_len;
        if m > 0 && failing.iter().all(|idx| idx[2] < m) {
            out.push(Pattern::MemoryColumnsOnly);
        }
        let masked_visible: Vec<&Vec<usize>> = failing
            .iter()
            .filter(|idx| !visibility.hidden(name, idx) && masked_in(got, idx, name))
            .collect();
        if !masked_visible.is_empty() {
            // Top-left alignment hides exactly i < j <= M + i in every row of every head.
            let (heads, l) = (want.shape()[0], want.shape()[1]);
            let top_left = m > 0
                && masked_visible.len() == heads * l * m
                && masked_visible
                    .iter()
                    .all(|idx| idx[2] > idx[1] && idx[2] <= m + idx[1]);
            out.push(Pattern::VisibleKeysMasked {
                count: masked_visible.len(),
                top_left,
            });
        }
        let distances: Vec<i64> = failing
            .iter()
            .map(|idx| (m + idx[1]) as i64 - idx[2] as i64)
            .collect();
        if let (Some(&from), Some(&to)) = (distances.iter().min(), distances.iter().max()) {
            if to - from < 3 && case.key_len() > 4 {
                out.push(Pattern::DistanceBand { from, to });
            }
        }
    }
    // The position axis: rows of a table, or the query/token axis of [H, L, ...].
    let axis = match want.ndim() {
        2 => Some(0),
        3 => Some(1),
        _ => None,
    };
    if let Some(axis) = axis {
        let rows = want.shape()[axis];
        if matches!(
            case.operation,
            Operation::Stream { .. } | Operation::Decode { .. }
        ) {
            if let Some(row) = failing.iter().map(|idx| idx[axis]).min() {
                if row > 0 {
                    out.push(Pattern::BeginsAtRow { row });
                }
            }
        }
        if rows >= 6 {
            let row_max: Vec<f64> = (0..rows)
                .map(|r| {
                    error_map
                        .index_axis(ndarray::Axis(axis), r)
                        .iter()
                        .copied()
                        .filter(|x| x.is_finite())
                        .fold(0.0, f64::max)
                })
                .collect();
            let third = rows / 3;
            let mean = |s: &[f64]| s.iter().sum::<f64>() / s.len() as f64;
            let (early, late) = (mean(&row_max[..third]), mean(&row_max[rows - third..]));
            if late > 1.0 && late > 4.0 * early.max(1e-12) {
                out.push(Pattern::GrowsWithPosition {
                    ratio: late / early.max(1e-12),
                });
            }
        }
    }
    out
}
