//! Comparison of a kernel's outputs with the expected ones, element by element against
//! their budgets ([`crate::budget`]), into a report value. A mismatch is a result (a
//! [`CaseReport`]), not an error.
//!
//! Masked entries are the ones the case hides (the causal mask over `[memory ; current]`
//! and the case's hidden keys), never the ones whose expected value happens to be 0: a
//! masked score passes when it is `-inf` or a finite sentinel carrying zero probability
//! in the budget dtype; a masked probability must be exactly 0. A visible probability
//! that underflows to 0 in the reference is compared like any other element (a kernel
//! may return a subnormal there).
//!
//! The element loop allocates nothing per element: coordinates are derived from flat
//! indices only for the few elements a report names.

use std::collections::BTreeMap;
use std::fmt;

use ndarray::{ArrayD, ArrayViewD};

use crate::budget::{budgets, Budget, Budgets};
pub use crate::case::Visibility;
use crate::case::{Arrays, Case, Operation, OperationKind, Output};
use crate::error::Result;
use crate::math::precision::{ulp_distance, Dtype};
use crate::reference::Outputs;
use crate::scheme::Scheme;
use crate::tensor::Tensor;

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
    /// Run the differential diagnosis on a failing case (crate::diagnose). Fuzzing and
    /// shrinking turn it off and diagnose only the minimal failing case.
    pub diagnose: bool,
}

impl Default for CompareOptions {
    fn default() -> Self {
        CompareOptions {
            factor: 2.0,
            budget_dtype: None,
            declared: None,
            diagnose: true,
        }
    }
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

impl Criterion {
    /// The name used in every report.
    pub fn name(self) -> &'static str {
        match self {
            Criterion::Analytic => "analytic",
            Criterion::Baseline => "baseline",
            Criterion::Exact => "exact",
        }
    }
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
    /// Some masked entries carry probability (finite values where zero or `-inf` is
    /// expected; NaN or `+inf` ones are counted in `non_finite`).
    Leak {
        /// How many masked entries leak.
        count: usize,
    },
    /// Masked entries that must be zero or `-inf` hold NaN or `+inf` (and none holds a
    /// finite leak).
    NonFinite {
        /// How many.
        count: usize,
    },
}

/// A short description of where the errors lie.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
#[serde(rename_all = "snake_case", tag = "kind")]
pub enum Pattern {
    /// Every over-budget element is a masked entry.
    MaskedEntriesOnly,
    /// Every over-budget element is a memory key (`j < M`), and current keys at the
    /// same distances are within budget (so the distance alone does not explain it).
    MemoryColumnsOnly,
    /// Every over-budget element has a distance `Δ = M + i - j` in this range, and
    /// visible elements at other distances are within budget.
    DistanceBand {
        /// Smallest distance with errors.
        from: i64,
        /// Largest distance with errors.
        to: i64,
    },
    /// The error grows along the position axis (last third vs first third), with a
    /// measurable error in the first third too.
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
    /// Rows before this one are within budget (the token index for stream and decode,
    /// the query for scores and attention, the table row for encode).
    BeginsAtRow {
        /// First row with an element over budget.
        row: usize,
    },
    /// Every over-budget element is in a row whose keys are all masked (the row must be
    /// all zeros).
    FullyMaskedRows {
        /// How many such rows are wrong.
        rows: usize,
        /// Whether they hold NaN.
        nan: bool,
    },
    /// The kernel's scores differ from the reference by one constant per query row
    /// (within budget): probabilities and outputs would agree.
    RowConstantShift {
        /// The largest shift seen.
        largest: f64,
    },
}

/// Something a user must know before trusting the numbers of a case.
#[derive(Debug, Clone, PartialEq)]
pub enum Warning {
    /// The kernel returned an output the case does not have.
    IgnoredOutput {
        /// The output's name as the kernel spelled it.
        name: String,
    },
    /// An output came back in another dtype than the kernel declared for the case.
    ArrayDtype {
        /// The output.
        output: Output,
        /// What the kernel declared.
        declared: Dtype,
        /// What the array carries.
        array: Dtype,
    },
    /// `--budget-dtype` asked for a looser budget than the declared dtype.
    LooseBudget {
        /// The output.
        output: Output,
        /// The dtype the budget was derived for.
        budget: Dtype,
        /// What the kernel declared.
        declared: Dtype,
    },
    /// Every value of an output is representable in a narrower dtype.
    FitsNarrower {
        /// The output.
        output: Output,
        /// What the kernel declared.
        declared: Dtype,
        /// The narrower dtype.
        narrow: Dtype,
    },
    /// The kernel computes the case in another dtype than the case is written for.
    ComputedIn {
        /// The case's dtype.
        case: Dtype,
        /// The dtypes the outputs were judged in.
        computed: Vec<Dtype>,
    },
    /// The kernel does not list the case's dtype; the case ran in another.
    NotListed {
        /// The case's dtype.
        case: Dtype,
        /// The dtype it ran in.
        ran: Dtype,
    },
    /// A large case compared one head at a time (to bound memory), whose failing
    /// outputs were not described further.
    ComparedByHead {
        /// Bytes the whole-array comparison would have held.
        bytes: u64,
    },
    /// A vector file written by another version of posconform, whose values this build
    /// derives differently (the stored ones are used).
    OtherVersion {
        /// Who wrote the file.
        writer: String,
        /// This build.
        this: String,
        /// Largest relative difference of expected values.
        expected: f64,
        /// Largest relative difference of tolerances.
        tolerance: f64,
    },
    /// A vector file written by another version that this build cannot re-derive.
    NotRederived {
        /// Who wrote the file.
        writer: String,
        /// This build.
        this: String,
        /// Why.
        reason: String,
    },
}

impl fmt::Display for Warning {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Warning::IgnoredOutput { name } => {
                write!(f, "output `{name}` is not part of this case and was ignored")
            }
            Warning::ArrayDtype {
                output,
                declared,
                array,
            } => {
                write!(
                    f,
                    "output `{output}` came back as {array} although the kernel computes this case in \
                     {declared}; judged at the {declared} budget"
                )?;
                if array.unit_roundoff() > declared.unit_roundoff() {
                    write!(
                        f,
                        "; values rounded to {array} cannot be expected to meet it"
                    )?;
                }
                Ok(())
            }
            Warning::LooseBudget {
                output,
                budget,
                declared,
            } => write!(
                f,
                "output `{output}`: tolerance derived for {budget}; your kernel claimed {declared}. \
                 A pass here does not show {declared} accuracy"
            ),
            Warning::FitsNarrower {
                output,
                declared,
                narrow,
            } => write!(
                f,
                "output `{output}`: the kernel claimed {declared} but every value is representable in \
                 {narrow}; it may compute in {narrow}"
            ),
            Warning::ComputedIn { case, computed } => {
                let names: Vec<&str> = computed.iter().map(|d| d.name()).collect();
                write!(
                    f,
                    "the case is written for {case}; the kernel computes it in {}, and budgets follow that dtype",
                    names.join(", ")
                )
            }
            Warning::NotListed { case, ran } => write!(
                f,
                "the case is written for {case}, which the kernel does not list; it was run in {ran}"
            ),
            Warning::ComparedByHead { bytes } => write!(
                f,
                "compared one head at a time to bound memory (the whole arrays need about {:.1} GB): \
                 error patterns, the heatmap and the fault diagnosis were not computed for this case; \
                 the shrunk minimal case, or the same case with fewer heads or a shorter window, has them",
                *bytes as f64 / 1e9
            ),
            Warning::OtherVersion {
                writer,
                this,
                expected,
                tolerance,
            } => write!(
                f,
                "written by {writer}; this build ({this}) derives expected values differing by up to \
                 {expected:.1e} (relative) and tolerances by up to {tolerance:.1e}; judged with the stored ones"
            ),
            Warning::NotRederived {
                writer,
                this,
                reason,
            } => write!(
                f,
                "written by {writer}; this build ({this}) cannot re-derive it ({reason}); judged with the stored values"
            ),
        }
    }
}

impl serde::Serialize for Warning {
    fn serialize<S: serde::Serializer>(&self, s: S) -> std::result::Result<S::Ok, S::Error> {
        s.collect_str(self)
    }
}

/// The comparison of one output array.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct OutputReport {
    /// The output.
    pub name: Output,
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
    /// Per-element error over tolerance, for heatmaps (`[H, L, K]` outputs that fail;
    /// not kept for a passing output, whose map no report shows).
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
    /// The scheme (`None` for a vector file that could not be read).
    pub scheme: Option<Scheme>,
    /// The operation (`None` for a vector file that could not be read).
    pub operation: Option<OperationKind>,
    /// Ids of the catalogued faults the case is built to expose.
    pub faults: Vec<String>,
    /// `M` and `L` of the case (for labelling heatmaps).
    pub memory_len: usize,
    /// `L`.
    pub query_len: usize,
    /// The verdict.
    pub verdict: Verdict,
    /// Per-output comparisons.
    pub outputs: Vec<OutputReport>,
    /// Things the user must know before trusting the numbers.
    pub warnings: Vec<Warning>,
    /// Which catalogued faults reproduce the outputs (failing cases that were
    /// diagnosed).
    pub diagnosis: Option<crate::diagnose::CaseDiagnosis>,
    /// How long the kernel took to answer, for a case a live kernel answered (`check`);
    /// `None` otherwise (`verify`, errors, skipped cases).
    pub time: Option<CaseTime>,
}

/// How long a kernel took for one case, as `check` saw it.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct CaseTime {
    /// Milliseconds from handing the inputs to the kernel to having its outputs parsed
    /// (over the protocol: the request written, the computation, the reply read).
    pub round_trip_ms: f64,
    /// Milliseconds the kernel reported for its own computation (the reply's
    /// `elapsed_ms`, docs/protocol.md), when it gave a finite, non-negative one.
    pub kernel_ms: Option<f64>,
}

impl CaseTime {
    /// The kernel's own time when it reported one, else the round trip, in seconds.
    pub fn seconds(&self) -> f64 {
        self.kernel_ms.unwrap_or(self.round_trip_ms) / 1e3
    }
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
            scheme: None,
            operation: None,
            faults: Vec::new(),
            memory_len: 0,
            query_len: 0,
            verdict: Verdict::Error(reason.into()),
            outputs: Vec::new(),
            warnings: Vec::new(),
            diagnosis: None,
            time: None,
        }
    }

    /// A report for a case the kernel does not support.
    pub fn skipped(case: &Case, reason: impl Into<String>) -> Self {
        Self::empty(case, Verdict::Skipped(reason.into()))
    }

    fn empty(case: &Case, verdict: Verdict) -> Self {
        CaseReport {
            case: case.id.clone(),
            scheme: Some(case.scheme.scheme()),
            operation: Some(case.operation.kind()),
            faults: case.faults.clone(),
            memory_len: case.memory_len,
            query_len: case.query_len,
            verdict,
            outputs: Vec::new(),
            warnings: Vec::new(),
            diagnosis: None,
            time: None,
        }
    }

    /// The scheme's name, `?` when unknown.
    pub fn scheme_name(&self) -> &'static str {
        self.scheme.map_or("?", Scheme::name)
    }

    /// The operation's name, `?` when unknown.
    pub fn operation_name(&self) -> &'static str {
        self.operation.map_or("?", OperationKind::name)
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
    compare_with_budgets(case, inputs, expected, got, options, &mut |dtype| {
        budgets(case, inputs, expected, dtype, options.factor)
    })
}

/// Budgets of every output of a case for one dtype, on demand.
pub type BudgetSource<'a> = dyn FnMut(Dtype) -> Result<Budgets> + 'a;

/// [`compare`] with the budgets supplied by `budgets_for` (per budget dtype; e.g. the
/// ones stored in a vector file).
pub fn compare_with_budgets(
    case: &Case,
    inputs: &Arrays,
    expected: &Outputs,
    got: &Arrays,
    options: &CompareOptions,
    budgets_for: &mut BudgetSource<'_>,
) -> Result<CaseReport> {
    let mut report = CaseReport::empty(case, Verdict::Pass);
    let known: Vec<&str> = expected.keys().map(|o| o.name()).collect();
    for name in got.keys().filter(|n| !known.contains(&n.as_str())) {
        report
            .warnings
            .push(Warning::IgnoredOutput { name: name.clone() });
    }
    let mut structural = Vec::new();
    let mut budget_cache: BTreeMap<Dtype, Budgets> = BTreeMap::new();
    let visibility = Visibility::of(case);
    for (&output, want) in expected {
        let Some(tensor) = got.get(output.name()) else {
            structural.push(format!("missing output `{output}`"));
            continue;
        };
        if tensor.shape() != want.shape() {
            structural.push(format!(
                "output `{output}` has shape {:?}, expected {:?}",
                tensor.shape(),
                want.shape()
            ));
            continue;
        }
        let exact = output.is_integer();
        if !exact && !tensor.dtype().is_float() {
            structural.push(format!(
                "output `{output}` is declared i64; a float dtype is expected"
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
                output,
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
        let Some(budget) = budgets_for_dtype.get(&output) else {
            structural.push(format!("no budget for output `{output}`"));
            continue;
        };
        let mut out = compare_output(
            case,
            output,
            want,
            tensor.view().view(),
            declared,
            budget,
            &visibility,
        );
        out.array_dtype = array_dtype;
        report.outputs.push(out);
    }
    warn_if_computed_in_another_dtype(case, &mut report);
    if !structural.is_empty() {
        report.verdict = Verdict::Error(structural.join("; "));
    } else if report.outputs.iter().any(|o| !o.passed) {
        report.verdict = Verdict::Fail;
        if options.diagnose {
            let dtype = options.declared.unwrap_or(case.dtype);
            let budget_dtype = options.budget_dtype.unwrap_or(dtype);
            if let Some(budgets) = budget_cache.get(&budget_dtype) {
                report.diagnosis = diagnosable(case).then(|| {
                    crate::diagnose::diagnose_case(
                        &crate::diagnose::CaseEvidence {
                            case,
                            inputs,
                            expected,
                            budgets,
                            dtype,
                        },
                        got,
                    )
                });
            }
        }
    }
    Ok(report)
}

/// The most output elements a case may have for the diagnosis to run on it (every
/// applicable fault's variant runs once): larger cases are left to their shrunk
/// minimal failures.
pub const DIAGNOSIS_ELEMENTS: usize = 1 << 21;

/// Whether a failing case is small enough to diagnose.
pub fn diagnosable(case: &Case) -> bool {
    case.output_shapes()
        .iter()
        .map(|(_, shape)| shape.iter().product::<usize>())
        .sum::<usize>()
        <= DIAGNOSIS_ELEMENTS
}

pub(crate) fn warn_about_dtypes(
    output: Output,
    declared: Dtype,
    array_dtype: Dtype,
    budget_dtype: Dtype,
    values: &Tensor,
    warnings: &mut Vec<Warning>,
) {
    if array_dtype != declared {
        warnings.push(Warning::ArrayDtype {
            output,
            declared,
            array: array_dtype,
        });
    }
    if budget_dtype.unit_roundoff() > declared.unit_roundoff() {
        warnings.push(Warning::LooseBudget {
            output,
            budget: budget_dtype,
            declared,
        });
    }
    // A kernel that claims a wide dtype but returns values that all fit a narrow one
    // probably computes in the narrow one (one pass over the values, converted one at
    // a time: a narrow answer is never widened whole).
    let narrows = [Dtype::Bf16, Dtype::F16, Dtype::F32];
    let mut fits = [true; 3];
    let mut finite = 0usize;
    values.for_each_value(|x| {
        if x.is_finite() && x != 0.0 {
            finite += 1;
            for (fit, narrow) in fits.iter_mut().zip(narrows) {
                *fit = *fit && narrow.represents(x);
            }
        }
    });
    if finite >= 16 {
        for (fit, narrow) in fits.into_iter().zip(narrows) {
            if narrow.unit_roundoff() > declared.unit_roundoff() && fit {
                warnings.push(Warning::FitsNarrower {
                    output,
                    declared,
                    narrow,
                });
                break;
            }
        }
    }
}

/// The coordinates of flat element `n` of an array of `shape` (row-major).
fn coordinates(mut n: usize, shape: &[usize]) -> Vec<usize> {
    let mut index = vec![0; shape.len()];
    for (axis, &size) in shape.iter().enumerate().rev() {
        let size = size.max(1);
        index[axis] = n % size;
        n /= size;
    }
    index
}

/// The worst element seen so far: the largest error over its own tolerance; among
/// infinite ratios a visible entry is shown before a masked one (a wrong value where
/// one is expected says more than a leak).
#[derive(Default)]
struct Worst {
    at: Option<usize>,
    ratio: f64,
    masked: bool,
    got: f64,
    expected: f64,
    tolerance: f64,
    /// The analytic bound there (0 where there is none).
    analytic: f64,
}

impl Worst {
    #[allow(clippy::too_many_arguments)]
    fn offer(
        &mut self,
        n: usize,
        ratio: f64,
        got: f64,
        expected: f64,
        tolerance: f64,
        analytic: f64,
        masked: bool,
    ) {
        let better = self.at.is_none()
            || ratio > self.ratio
            || (self.masked && !masked && ratio >= self.ratio);
        if better {
            *self = Worst {
                at: Some(n),
                ratio,
                masked,
                got,
                expected,
                tolerance,
                analytic,
            };
        }
    }
}

/// The largest kernel score over the visible entries of each row of `want`/`got`
/// (whole rows of `keys` entries starting at flat element `start`), for sentinels.
/// Adds [`Warning::ComputedIn`] when the float outputs were judged in dtypes other
/// than the case's.
pub(crate) fn warn_if_computed_in_another_dtype(case: &Case, report: &mut CaseReport) {
    let computed: std::collections::BTreeSet<Dtype> = report
        .outputs
        .iter()
        .filter(|o| !o.name.is_integer())
        .map(|o| o.dtype)
        .collect();
    if computed.iter().any(|d| *d != case.dtype) {
        report.warnings.push(Warning::ComputedIn {
            case: case.dtype,
            computed: computed.into_iter().collect(),
        });
    }
}

/// Whether a masked entry holds what it must: a -inf score, or a finite one carrying
/// zero probability in its row (`row_max`, asked only then, is the row's largest
/// expected score; `smallest` the smallest positive value of the dtype); a zero
/// probability.
fn masked_holds(is_scores: bool, got: f64, row_max: impl FnOnce() -> f64, smallest: f64) -> bool {
    if !is_scores {
        return got == 0.0;
    }
    if got == f64::NEG_INFINITY {
        return true;
    }
    if !got.is_finite() {
        return false;
    }
    let max = row_max();
    max == f64::NEG_INFINITY || 2.0 * (got - max).exp() < smallest
}

fn row_maxima(
    want: &[f64],
    got: &[f64],
    keys: usize,
    start: usize,
    visibility: &Visibility,
) -> Vec<f64> {
    want.chunks(keys)
        .zip(got.chunks(keys))
        .enumerate()
        .map(|(row, (w, g))| {
            w.iter()
                .zip(g)
                .enumerate()
                .filter(|&(j, (w, g))| {
                    w.is_finite() && g.is_finite() && !visibility.hidden(start + row * keys + j)
                })
                .fold(f64::NEG_INFINITY, |m, (_, (_, &g))| m.max(g))
        })
        .collect()
}

/// The element statistics of one output, fed in row-major pieces that start on a row
/// boundary ([`Tally::feed`]): the whole array at once ([`compare_output`]) or one head
/// at a time ([`crate::stream`]), with the same result either way, since every
/// statistic is a count, a maximum or the first element with the largest ratio, taken
/// in the same element order.
pub(crate) struct Tally<'v> {
    key_indexed: bool,
    is_scores: bool,
    keys: usize,
    visibility: &'v Visibility,
    allowance: f64,
    smallest: f64,
    declared: Dtype,
    stats: OutputReport,
    /// Flat indices of the elements over budget, when kept (for the patterns).
    failing: Option<Vec<usize>>,
    over_budget: usize,
    leaks: usize,
    masked_non_finite: usize,
    sentinel: Option<f64>,
    saw_mask: bool,
    worst: Worst,
    analytic_holds: bool,
    exact: bool,
}

impl<'v> Tally<'v> {
    /// A tally for `output` of `shape` judged against `budget` (its analytic bound is
    /// given piece by piece to [`Tally::feed`]); `keep_failing` keeps the indices of
    /// the elements over budget.
    pub(crate) fn new(
        output: Output,
        shape: &[usize],
        declared: Dtype,
        budget: &Budget,
        visibility: &'v Visibility,
        keep_failing: bool,
    ) -> Self {
        let key_indexed = output.is_key_indexed() && shape.len() == 3;
        Tally {
            key_indexed,
            is_scores: key_indexed && output == Output::Scores,
            keys: if key_indexed { shape[2].max(1) } else { 1 },
            visibility,
            allowance: budget.allowance(),
            // A probability rounds to zero in the dtype when it is below half the
            // smallest positive value; compared as 2p < smallest, since half of f64's
            // smallest subnormal is itself 0.
            smallest: smallest_positive(budget.dtype),
            declared,
            stats: OutputReport {
                name: output,
                shape: shape.to_vec(),
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
            },
            failing: keep_failing.then(Vec::new),
            over_budget: 0,
            leaks: 0,
            masked_non_finite: 0,
            sentinel: None,
            saw_mask: false,
            worst: Worst::default(),
            analytic_holds: budget.analytic.is_some(),
            exact: budget.exact,
        }
    }

    /// Judges the elements `start..start + want.len()` (`start` on a row boundary):
    /// expected values, the kernel's, and the analytic bounds of the same elements.
    pub(crate) fn feed(
        &mut self,
        start: usize,
        want: &[f64],
        got: &[f64],
        analytic: Option<&[f64]>,
    ) {
        let (key_indexed, is_scores, keys) = (self.key_indexed, self.is_scores, self.keys);
        let (allowance, smallest, declared) = (self.allowance, self.smallest, self.declared);
        let visibility = self.visibility;
        let row_max = if is_scores {
            row_maxima(want, got, keys, start, visibility)
        } else {
            Vec::new()
        };
        let masked =
            |n: usize, w: f64| key_indexed && (visibility.hidden(n) || w == f64::NEG_INFINITY);
        // A masked entry holds what it must: a -inf score, or a finite one carrying zero
        // probability; a zero probability.
        let masked_ok =
            |local: usize, g: f64| masked_holds(is_scores, g, || row_max[local / keys], smallest);
        let stats = &mut self.stats;
        for (local, (&w, &g)) in want.iter().zip(got).enumerate() {
            let n = start + local;
            stats.elements += 1;
            let analytic = analytic.and_then(|a| a.get(local)).copied().unwrap_or(0.0);
            if masked(n, w) {
                self.saw_mask = true;
                if is_scores && g.is_finite() && g != f64::NEG_INFINITY {
                    self.sentinel = Some(self.sentinel.map_or(g, |s: f64| s.max(g)));
                }
                if !masked_ok(local, g) {
                    if g.is_nan() || g == f64::INFINITY {
                        stats.non_finite += 1;
                        self.masked_non_finite += 1;
                    } else {
                        self.leaks += 1;
                    }
                    self.worst
                        .offer(n, f64::INFINITY, g, w, 0.0, analytic, true);
                    self.over_budget += 1;
                    if let Some(f) = &mut self.failing {
                        f.push(n);
                    }
                }
                continue;
            }
            let tolerance = analytic.max(allowance);
            if !g.is_finite() {
                // A non-finite answer where a finite one is expected is an infinite error.
                stats.max_abs = f64::INFINITY;
                stats.max_rel = f64::INFINITY;
                stats.max_ulp = f64::INFINITY;
                stats.non_finite += 1;
                self.worst
                    .offer(n, f64::INFINITY, g, w, tolerance, analytic, false);
                self.over_budget += 1;
                if let Some(f) = &mut self.failing {
                    f.push(n);
                }
                continue;
            }
            let err = (g - w).abs();
            stats.max_abs = stats.max_abs.max(err);
            if w != 0.0 {
                stats.max_rel = stats.max_rel.max(err / w.abs());
            }
            stats.max_ulp = stats.max_ulp.max(ulp_distance(g, w, declared));
            if err > analytic {
                self.analytic_holds = false;
            }
            let ratio = if tolerance > 0.0 {
                err / tolerance
            } else if err > 0.0 {
                f64::INFINITY
            } else {
                0.0
            };
            self.worst.offer(n, ratio, g, w, tolerance, analytic, false);
            if err > tolerance {
                self.over_budget += 1;
                if let Some(f) = &mut self.failing {
                    f.push(n);
                }
            }
        }
    }

    /// The report of the output (without patterns), and the failing indices if kept.
    pub(crate) fn finish(self) -> (OutputReport, Vec<usize>) {
        let mut stats = self.stats;
        let worst = self.worst;
        if let Some(n) = worst.at {
            stats.worst = Some(coordinates(n, &stats.shape));
            stats.worst_got = worst.got;
            stats.worst_expected = worst.expected;
            stats.worst_tolerance = worst.tolerance;
            stats.worst_ratio = worst.ratio;
            stats.worst_error = if worst.got == worst.expected {
                0.0
            } else {
                (worst.got - worst.expected).abs()
            };
        }
        stats.over_budget = self.over_budget;
        stats.passed = self.over_budget == 0;
        if !self.exact {
            // A pass names what accepted it; a failure names the criterion whose
            // tolerance applied at the worst element (the larger of the two there).
            let analytic_governs = if stats.passed {
                self.analytic_holds
            } else {
                worst.at.is_some() && worst.analytic >= self.allowance
            };
            stats.decided_by = if analytic_governs {
                Criterion::Analytic
            } else {
                Criterion::Baseline
            };
        }
        if self.key_indexed {
            stats.masking = self.saw_mask.then_some(if self.leaks > 0 {
                Masking::Leak { count: self.leaks }
            } else if self.masked_non_finite > 0 {
                Masking::NonFinite {
                    count: self.masked_non_finite,
                }
            } else if let Some(value) = self.sentinel {
                Masking::Sentinel { value }
            } else {
                Masking::NegativeInfinity
            });
        }
        (stats, self.failing.unwrap_or_default())
    }
}

/// Compares one output: every element against its tolerance (the larger of its
/// analytic bound and the baseline allowance), masked entries by visibility.
pub fn compare_output(
    case: &Case,
    output: Output,
    want: &ArrayD<f64>,
    got: ArrayViewD<'_, f64>,
    declared: Dtype,
    budget: &Budget,
    visibility: &Visibility,
) -> OutputReport {
    let shape = want.shape().to_vec();
    let want_std = want.as_standard_layout();
    let got_std = got.as_standard_layout();
    let (want_s, got_s) = (
        want_std.as_slice().unwrap_or(&[]),
        got_std.as_slice().unwrap_or(&[]),
    );
    let mut tally = Tally::new(output, &shape, declared, budget, visibility, true);
    let analytic_bounds = budget.analytic.as_ref().and_then(|a| a.as_slice());
    tally.feed(0, want_s, got_s, analytic_bounds);
    let (mut stats, failing) = tally.finish();
    if !stats.passed {
        let key_indexed = output.is_key_indexed() && want.ndim() == 3;
        let is_scores = key_indexed && output == Output::Scores;
        let keys = if key_indexed { shape[2].max(1) } else { 1 };
        let allowance = budget.allowance();
        let smallest = smallest_positive(budget.dtype);
        let row_max = if is_scores {
            row_maxima(want_s, got_s, keys, 0, visibility)
        } else {
            Vec::new()
        };
        let analytic_at = |n: usize| {
            analytic_bounds
                .and_then(|a| a.get(n))
                .copied()
                .unwrap_or(0.0)
        };
        // The ratio of error to tolerance (infinite for a leak or a non-finite
        // answer), as the tally judged each element; only failing outputs keep the
        // map of them.
        let ratio_at = |n: usize, w: f64, g: f64| {
            if key_indexed && (visibility.hidden(n) || w == f64::NEG_INFINITY) {
                let ok = masked_holds(is_scores, g, || row_max[n / keys], smallest);
                return if ok { 0.0 } else { f64::INFINITY };
            }
            if !g.is_finite() {
                return f64::INFINITY;
            }
            let err = (g - w).abs();
            let tolerance = analytic_at(n).max(allowance);
            if tolerance > 0.0 {
                err / tolerance
            } else if err > 0.0 {
                f64::INFINITY
            } else {
                0.0
            }
        };
        let ratios = want_s
            .iter()
            .zip(got_s)
            .enumerate()
            .map(|(n, (&w, &g))| ratio_at(n, w, g))
            .collect();
        let error_map = ArrayD::from_shape_vec(ndarray::IxDyn(&shape), ratios)
            .unwrap_or_else(|_| ArrayD::zeros(ndarray::IxDyn(&shape)));
        stats.patterns = patterns(
            case,
            output,
            &shape,
            Values {
                want: want_s,
                got: got_s,
            },
            &failing,
            &error_map,
            visibility,
        );
        if key_indexed {
            stats.error_map = Some(error_map);
        }
    }
    stats
}

/// Whether the kernel's value is a masked one (`-inf` score, zero probability).
fn masked_value(g: f64, output: Output) -> bool {
    if output == Output::Probs {
        g == 0.0
    } else {
        g == f64::NEG_INFINITY || g < -1e30
    }
}

/// An output's expected and returned values, flat in row-major order.
#[derive(Clone, Copy)]
struct Values<'a> {
    want: &'a [f64],
    got: &'a [f64],
}

/// Where the errors lie, stated only when true and informative: a distance band only
/// when visible elements at other distances pass, a memory claim only when current
/// keys at the same distances pass, growth only against a first third that has a
/// measurable error itself.
fn patterns(
    case: &Case,
    output: Output,
    shape: &[usize],
    values: Values<'_>,
    failing: &[usize],
    error_map: &ArrayD<f64>,
    visibility: &Visibility,
) -> Vec<Pattern> {
    let mut out = Vec::new();
    let got = values.got;
    let key_indexed =
        case.operation.kind().is_window() && output.is_key_indexed() && shape.len() == 3;
    let over = |n: usize| error_map.as_slice().is_none_or(|e| e[n] > 1.0);
    if key_indexed {
        let (l, k) = (shape[1], shape[2]);
        let query = |n: usize| (n / k) % l;
        let key = |n: usize| n % k;
        let row_of = |n: usize| n / k;
        let m = case.memory_len;
        // Rows whose every key is hidden: they must be all zeros.
        let empty_row = |r: usize| (0..k).all(|j| visibility.hidden(r * k + j));
        let failing_empty: std::collections::BTreeSet<usize> = failing
            .iter()
            .map(|&n| row_of(n))
            .filter(|&r| empty_row(r))
            .collect();
        let in_empty_rows = failing.iter().all(|&n| empty_row(row_of(n)));
        if in_empty_rows && !failing.is_empty() {
            out.push(Pattern::FullyMaskedRows {
                rows: failing_empty.len(),
                nan: failing.iter().any(|&n| got[n].is_nan()),
            });
        } else if failing.iter().all(|&n| visibility.hidden(n))
            && failing.iter().any(|&n| got[n].is_finite())
        {
            out.push(Pattern::MaskedEntriesOnly);
        }
        let visible_failing: Vec<usize> = failing
            .iter()
            .copied()
            .filter(|&n| !visibility.hidden(n))
            .collect();
        let distance = |n: usize| (m + query(n)) as i64 - key(n) as i64;
        // Distances of visible elements within budget, by whether the key is memory.
        let mut passing_current = std::collections::BTreeSet::new();
        let mut passing_any = std::collections::BTreeSet::new();
        for n in 0..got.len() {
            if !visibility.hidden(n) && !over(n) {
                passing_any.insert(distance(n));
                if key(n) >= m {
                    passing_current.insert(distance(n));
                }
            }
        }
        if m > 0
            && !visible_failing.is_empty()
            && visible_failing.len() == failing.len()
            && visible_failing.iter().all(|&n| key(n) < m)
            && visible_failing
                .iter()
                .any(|&n| passing_current.contains(&distance(n)))
        {
            out.push(Pattern::MemoryColumnsOnly);
        }
        let masked_visible: Vec<usize> = visible_failing
            .iter()
            .copied()
            .filter(|&n| masked_value(got[n], output))
            .collect();
        if !masked_visible.is_empty() {
            // Top-left alignment hides exactly i < j <= M + i in every row of every head.
            let heads = shape[0];
            let top_left = m > 0
                && masked_visible.len() == heads * l * m
                && masked_visible
                    .iter()
                    .all(|&n| key(n) > query(n) && key(n) <= m + query(n));
            out.push(Pattern::VisibleKeysMasked {
                count: masked_visible.len(),
                top_left,
            });
        }
        let distances = visible_failing.iter().map(|&n| distance(n));
        let memory_only = out.contains(&Pattern::MemoryColumnsOnly);
        if let (Some(from), Some(to), false) =
            (distances.clone().min(), distances.max(), memory_only)
        {
            // Informative only if elements at other visible distances pass, and true only
            // if most visible elements inside the band are over budget (a band whose
            // elements mostly pass is not where the error lies).
            let in_band = (0..got.len())
                .filter(|&n| !visibility.hidden(n) && (from..=to).contains(&distance(n)))
                .count();
            if passing_any.iter().any(|&d| d < from || d > to)
                && 2 * visible_failing.len() >= in_band
            {
                out.push(Pattern::DistanceBand { from, to });
            }
        }
        if output == Output::Scores {
            if let Some(largest) = row_constant_shift(values, shape, failing, visibility, error_map)
            {
                out.push(Pattern::RowConstantShift { largest });
            }
        }
    }
    // The position axis: rows of a table, or the query/token axis of [H, L, ...].
    let axis = match shape.len() {
        2 => Some(0),
        3 => Some(1),
        _ => None,
    };
    if let Some(axis) = axis {
        let rows = shape[axis];
        let inner: usize = shape[axis + 1..].iter().product();
        let first_row = failing.iter().map(|&n| (n / inner.max(1)) % rows).min();
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
        let mean = |s: &[f64]| s.iter().sum::<f64>() / s.len().max(1) as f64;
        let (early, late) = if third > 0 {
            (mean(&row_max[..third]), mean(&row_max[rows - third..]))
        } else {
            (0.0, 0.0)
        };
        let streaming = matches!(
            case.operation,
            Operation::Stream { .. } | Operation::Decode { .. }
        );
        if let Some(row) = first_row.filter(|&r| r > 0) {
            if streaming || rows >= 6 {
                out.push(Pattern::BeginsAtRow { row });
            }
        } else if rows >= 6 && early >= 0.05 && late > 1.0 && late > 4.0 * early {
            // Growth is stated against a first third with a measurable error of its
            // own (at least 5% of its tolerance): a ratio to nothing says nothing.
            out.push(Pattern::GrowsWithPosition {
                ratio: late / early,
            });
        }
    }
    out
}

/// The largest per-row shift when every query row's visible score errors are one
/// constant (within twice the row's largest tolerance) and only visible scores fail.
fn row_constant_shift(
    values: Values<'_>,
    shape: &[usize],
    failing: &[usize],
    visibility: &Visibility,
    error_map: &ArrayD<f64>,
) -> Option<f64> {
    let k = shape[2];
    if failing.iter().any(|&n| visibility.hidden(n)) {
        return None;
    }
    let ratios = error_map.as_slice()?;
    let mut largest = 0.0f64;
    for (r, (want, got)) in values.want.chunks(k).zip(values.got.chunks(k)).enumerate() {
        let mut lo = f64::INFINITY;
        let mut hi = f64::NEG_INFINITY;
        let mut tolerance = 0.0f64;
        for j in 0..k {
            let n = r * k + j;
            if visibility.hidden(n) || !want[j].is_finite() {
                continue;
            }
            if !got[j].is_finite() {
                return None;
            }
            let d = got[j] - want[j];
            lo = lo.min(d);
            hi = hi.max(d);
            let ratio = ratios[n];
            if ratio > 0.0 && ratio.is_finite() {
                tolerance = tolerance.max(d.abs() / ratio);
            }
        }
        if lo.is_finite() {
            if hi - lo > 2.0 * tolerance {
                return None;
            }
            largest = largest.max(lo.abs().max(hi.abs()));
        }
    }
    (largest > 0.0).then_some(largest)
}
