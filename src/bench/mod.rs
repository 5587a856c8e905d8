//! Benchmarks: named workloads timed in the same process as two calibration workloads,
//! so every figure is also a machine-portable ratio, and a gate that compares a run
//! with a baseline run (docs/bench.md).
//!
//! A workload is one scheme × operation × shape × dtype, named
//! `scheme/operation/shape/dtype` (`rotary/attention/L128_M128_d64_h4/f32`; the shape
//! part as the criterion benches write theirs). It runs either on the library's own
//! reference ([`reference::expected`], in process) or on a team's kernel through the
//! [`Kernel`] trait: over the stdio protocol, or in process from Python.
//!
//! The timed rounds of every workload are shared out over blocks (default 5): in each
//! block every workload in turn takes its share (one untimed run first, `warmup` before
//! its first block), each round being the calibration, the workload and, for a kernel
//! that answers `dry_run`, the same exchange without the computation. A workload's
//! blocks therefore lie apart in time, as separate runs would.
//!
//! The figure is the kernel's own time when it reports one (`elapsed_ms`) for every
//! run, the round trip otherwise. Its ratio is its median over the median calibration
//! unit of the same rounds ([`calibrate`]), with the combined standard error of the two
//! medians. Its floor ratio, the figure the gate compares, is the median over blocks of
//! each block's fastest run over that block's fastest unit, and its noise is half the
//! range of those block floors ([`stats`]): a busy machine moves medians and leaves
//! floors alone, and what moves floors from one run to the next moves them from one
//! block to the next too.

pub mod calibrate;
pub mod gate;
pub mod render;
pub mod stats;

use std::collections::BTreeMap;
use std::fmt;
use std::str::FromStr;
use std::time::Instant;

use serde_json::{json, Value};

use crate::case::{Arrays, Case, Operation, OperationKind};
use crate::error::{Error, KernelErrorKind, Result};
use crate::kernel::{Answer, ArraySpec, Kernel, KernelInfo};
use crate::math::precision::Dtype;
use crate::reference;
use crate::run::select::Filter;
use crate::scheme::{Scheme, SchemeSpec};
use crate::tensor::Tensor;

use calibrate::{Calibration, Probe, Sample};
use stats::Summary;

/// The sizes of a workload: `H` heads, `L` queries, `M` memory keys, head width `d`.
/// Written `L128_M128_d64_h4`; `stream` sends `T = 2L` tokens in segments of `L` with
/// memory `M`, `decode` a prefill of `P = max(M, 1)` tokens and then `L` more in chunks
/// of up to 16.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BenchShape {
    /// `H`.
    pub heads: usize,
    /// `L`.
    pub query_len: usize,
    /// `M`.
    pub memory_len: usize,
    /// `d`.
    pub head_dim: usize,
}

/// The named shapes `--shape` accepts besides `L.._M.._d.._h..`.
pub const PRESETS: &[(&str, BenchShape)] = &[
    (
        "small",
        BenchShape {
            heads: 2,
            query_len: 32,
            memory_len: 32,
            head_dim: 32,
        },
    ),
    (
        "medium",
        BenchShape {
            heads: 4,
            query_len: 128,
            memory_len: 128,
            head_dim: 64,
        },
    ),
    (
        "large",
        BenchShape {
            heads: 8,
            query_len: 512,
            memory_len: 512,
            head_dim: 64,
        },
    ),
];

/// The longest side a benchmark shape may have (a guard against typing mistakes; the
/// element limit of every array is checked again when a case is built).
const MAX_SIDE: usize = 1 << 16;

impl BenchShape {
    /// The shape of preset `name`.
    pub fn preset(name: &str) -> Option<BenchShape> {
        PRESETS.iter().find(|(n, _)| *n == name).map(|(_, s)| *s)
    }
}

impl fmt::Display for BenchShape {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "L{}_M{}_d{}_h{}",
            self.query_len, self.memory_len, self.head_dim, self.heads
        )
    }
}

impl FromStr for BenchShape {
    type Err = Error;

    /// A preset name (`small`, `medium`, `large`) or `L<L>_M<M>_d<d>_h<H>`.
    fn from_str(text: &str) -> Result<BenchShape> {
        if let Some(shape) = BenchShape::preset(text) {
            return Ok(shape);
        }
        let bad = |why: &str| {
            Error::param(
                "shape",
                format!(
                    "small, medium, large or L<L>_M<M>_d<d>_h<H> such as L128_M128_d64_h4 ({why})"
                ),
                format!("{text:?}"),
            )
        };
        let fields: Vec<&str> = text.split('_').collect();
        let [l, m, d, h] = fields.as_slice() else {
            return Err(bad("four fields joined by _"));
        };
        let number = |field: &str, letter: char| -> Result<usize> {
            let digits = field
                .strip_prefix(letter)
                .ok_or_else(|| bad("fields in the order L, M, d, h"))?;
            if digits.is_empty() || !digits.bytes().all(|b| b.is_ascii_digit()) {
                return Err(bad("each letter followed by a decimal number"));
            }
            let value: usize = digits.parse().map_err(|_| bad("a number too large"))?;
            if value > MAX_SIDE {
                return Err(bad("each size at most 65536"));
            }
            Ok(value)
        };
        let shape = BenchShape {
            query_len: number(l, 'L')?,
            memory_len: number(m, 'M')?,
            head_dim: number(d, 'd')?,
            heads: number(h, 'h')?,
        };
        if shape.query_len == 0 || shape.heads == 0 || shape.head_dim == 0 {
            return Err(bad("L, d and h at least 1"));
        }
        if shape.head_dim % 2 == 1 {
            return Err(bad("d even: sinusoids and rotations pair dimensions"));
        }
        Ok(shape)
    }
}

/// One named workload: a case built for timing.
#[derive(Debug, Clone, PartialEq)]
pub struct Workload {
    /// `scheme/operation/shape/dtype`.
    pub name: String,
    /// Its shape.
    pub shape: BenchShape,
    /// The case it runs (scheme parameters, sizes, dtype, seed).
    pub case: Case,
}

impl Workload {
    /// The scheme.
    pub fn scheme(&self) -> Scheme {
        self.case.scheme.scheme()
    }

    /// The operation.
    pub fn operation(&self) -> OperationKind {
        self.case.operation.kind()
    }

    /// The dtype.
    pub fn dtype(&self) -> Dtype {
        self.case.dtype
    }
}

/// The scheme parameters a workload of `scheme` may use, the first the kernel declares
/// being taken: fixed, published defaults (docs/conventions.md), with the other value
/// of an enumerated parameter as a fallback for a kernel that implements only that one.
fn scheme_variants(scheme: Scheme, shape: BenchShape, max_positions: usize) -> Vec<Value> {
    match scheme {
        Scheme::Sinusoidal => ["interleaved", "concatenated"]
            .iter()
            .map(|layout| json!({"name": "sinusoidal", "base": 10000.0, "layout": layout}))
            .collect(),
        Scheme::Learned => vec![json!({"name": "learned", "max_positions": max_positions})],
        Scheme::XlRelative => vec![json!({
            "name": "xl_relative", "scale": "inverse_sqrt_dim", "clamp_len": null
        })],
        Scheme::Rotary => ["half_split", "adjacent"]
            .iter()
            .map(|pairing| {
                json!({
                    "name": "rotary", "rotary_dim": shape.head_dim, "base": 10000.0,
                    "pairing": pairing, "scaling": "none", "scale": "inverse_sqrt_dim"
                })
            })
            .collect(),
        Scheme::Alibi => vec![json!({"name": "alibi", "scale": "inverse_sqrt_dim"})],
        Scheme::Bucketed => [false, true]
            .iter()
            .map(|bidirectional| {
                json!({
                    "name": "bucketed", "num_buckets": 32, "max_distance": 128,
                    "bidirectional": bidirectional, "scale": {"fixed": 1.0}
                })
            })
            .collect(),
        Scheme::Clipped => vec![json!({
            "name": "clipped", "clip_distance": 16, "scale": "inverse_sqrt_dim"
        })],
    }
}

/// The cases of a workload, one per parameter variant (see [`scheme_variants`]).
pub fn workload_cases(
    scheme: Scheme,
    operation: OperationKind,
    shape: BenchShape,
    dtype: Dtype,
) -> Result<Vec<Case>> {
    let BenchShape {
        heads,
        query_len,
        memory_len,
        head_dim,
    } = shape;
    let operation = match operation {
        OperationKind::Encode => Operation::Encode,
        OperationKind::Scores => Operation::Scores,
        OperationKind::Attention => Operation::Attention,
        OperationKind::Stream => Operation::Stream {
            tokens: 2 * query_len,
        },
        OperationKind::Decode => {
            let prefill = memory_len.max(1);
            let chunks = (0..query_len)
                .step_by(16)
                .map(|start| (query_len - start).min(16))
                .collect();
            Operation::Decode {
                tokens: prefill + query_len,
                prefill,
                chunks,
            }
        }
    };
    // Far from position 0 (where rotations are the identity), except for a learned
    // table, whose keys then start at position 0.
    let query_start: i64 = match (scheme, &operation) {
        (Scheme::Learned, Operation::Encode | Operation::Scores | Operation::Attention) => {
            memory_len as i64
        }
        (Scheme::Learned, _) => 0,
        _ => 1000,
    };
    let reach = query_start as usize + 2 * query_len + memory_len + 1;
    let max_positions = reach.div_ceil(64) * 64;
    let name = workload_name(scheme, operation.kind(), shape, dtype);
    let id = format!("bench.{}", name.replace('/', "."));
    scheme_variants(scheme, shape, max_positions)
        .into_iter()
        .map(|spec| {
            let spec: SchemeSpec = serde_json::from_value(spec)
                .map_err(|e| Error::format(format!("workload {name}"), e.to_string()))?;
            let case = Case {
                id: id.clone(),
                scheme: spec,
                operation: operation.clone(),
                heads,
                query_len,
                memory_len,
                head_dim,
                query_start,
                hidden_keys: Vec::new(),
                dtype,
                seed: crate::suite::seed_of(&id),
                faults: Vec::new(),
                input_scale: 1.0,
                purpose: format!("benchmark workload {name}"),
            };
            case.validate()
                .map_err(|e| Error::format(format!("workload {name}"), e.to_string()))?;
            Ok(case)
        })
        .collect()
}

/// `scheme/operation/shape/dtype`.
pub fn workload_name(
    scheme: Scheme,
    operation: OperationKind,
    shape: BenchShape,
    dtype: Dtype,
) -> String {
    format!(
        "{}/{}/{shape}/{}",
        scheme.name(),
        operation.name(),
        dtype.name()
    )
}

fn keeps(
    filter: &Filter,
    scheme: Scheme,
    operation: OperationKind,
    dtype: Dtype,
    name: &str,
) -> bool {
    filter.keeps_kind(scheme, operation, dtype) && filter.keeps_id(name)
}

fn none_selected(filter: &Filter, total: usize) -> Error {
    Error::format(
        filter.describe_with("--workload"),
        format!("these filters select none of the {total} workloads; nothing to time"),
    )
}

/// The reference's workloads: every scheme × operation × shape, in f64 (the oracle
/// `check` and `verify` compare with), that `filter` keeps (its id patterns match
/// workload names). An error when the filter keeps none.
pub fn reference_workloads(shapes: &[BenchShape], filter: &Filter) -> Result<Vec<Workload>> {
    let mut out = Vec::new();
    let mut total = 0;
    for &shape in shapes {
        for &scheme in Scheme::ALL {
            for operation in OperationKind::ALL {
                total += 1;
                let name = workload_name(scheme, operation, shape, Dtype::F64);
                if !keeps(filter, scheme, operation, Dtype::F64, &name) {
                    continue;
                }
                let case = workload_cases(scheme, operation, shape, Dtype::F64)?
                    .into_iter()
                    .next()
                    .ok_or_else(|| Error::format(&name, "no parameters for this scheme"))?;
                out.push(Workload { name, shape, case });
            }
        }
    }
    if out.is_empty() {
        return Err(none_selected(filter, total));
    }
    Ok(out)
}

/// A kernel's workloads: every scheme × operation it declares, in every dtype it
/// declares there, at every shape, that `filter` keeps; each with the first parameter
/// variant it declares. The notes say what could not be built. An error when the
/// filter keeps none.
pub fn kernel_workloads(
    info: &KernelInfo,
    shapes: &[BenchShape],
    filter: &Filter,
) -> Result<(Vec<Workload>, Vec<String>)> {
    let mut out = Vec::new();
    let mut notes = Vec::new();
    let mut total = 0;
    for &shape in shapes {
        for &scheme in Scheme::ALL {
            for operation in OperationKind::ALL {
                for dtype in info.operation_dtypes(scheme, operation) {
                    total += 1;
                    let name = workload_name(scheme, operation, shape, dtype);
                    if !keeps(filter, scheme, operation, dtype, &name) {
                        continue;
                    }
                    let cases = workload_cases(scheme, operation, shape, dtype)?;
                    let mut reason = String::new();
                    let declared = cases.into_iter().find(|case| match info.declares(case) {
                        Ok(()) => true,
                        Err(why) => {
                            reason = why;
                            false
                        }
                    });
                    match declared {
                        Some(case) => out.push(Workload { name, shape, case }),
                        None => notes.push(format!(
                            "{name} not timed: none of its parameter sets is declared ({reason})"
                        )),
                    }
                }
            }
        }
    }
    if out.is_empty() {
        if total > 0 && notes.is_empty() {
            return Err(none_selected(filter, total));
        }
        return Err(Error::format(
            "workloads",
            if total == 0 {
                "the kernel declares no scheme and operation to time".to_string()
            } else {
                format!(
                    "none of the selected workloads can be timed: {}",
                    notes.join("; ")
                )
            },
        ));
    }
    Ok((out, notes))
}

/// How a bench runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BenchOptions {
    /// Untimed runs of each workload before its timed ones (at least one is made for a
    /// kernel: its answer tells the dry run which arrays to send back).
    pub warmup: usize,
    /// Timed runs of each workload.
    pub repeat: usize,
    /// Blocks the timed runs are shared out over ([`measure`]); the spread of the
    /// blocks' floors is the noise the gate judges by.
    pub blocks: usize,
}

/// Headroom probes at the start of every block.
pub const PROBES: usize = 3;
/// The pause before them: long enough for a kernel's threads to stop spinning after
/// its last run (a BLAS library's workers spin for a while before they sleep; our
/// choice, from the numpy example kernel, whose single-product probes read 0.31
/// without a pause on an otherwise idle 2-core machine).
pub const PROBE_PAUSE: std::time::Duration = std::time::Duration::from_millis(200);

/// Blocks when none are given: five (our choice: enough for the range of the block
/// floors to mean something, few enough that every block keeps three runs of the
/// default fifteen).
pub const DEFAULT_BLOCKS: usize = 5;

impl Default for BenchOptions {
    fn default() -> Self {
        BenchOptions {
            warmup: 3,
            repeat: 15,
            blocks: DEFAULT_BLOCKS,
        }
    }
}

/// What is timed.
pub enum Target<'k> {
    /// The library's reference ([`reference::expected`]), in process.
    Reference,
    /// A kernel over the protocol: dry runs measure the exchange's own cost.
    Kernel(&'k mut dyn Kernel),
    /// A kernel in the same process (the Python package's path): no protocol, so no
    /// dry run.
    InProcess(&'k mut dyn Kernel),
}

/// Where a workload's figure comes from.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Measured {
    /// The reference's own computation, timed around the call.
    InProcess,
    /// The kernel's own `elapsed_ms`, reported in every timed run.
    Kernel,
    /// The round trip as the harness measured it (the kernel reported no time).
    RoundTrip,
}

impl Measured {
    /// The name in reports and in the JSON document.
    pub fn name(self) -> &'static str {
        match self {
            Measured::InProcess => "in_process",
            Measured::Kernel => "kernel",
            Measured::RoundTrip => "round_trip",
        }
    }
}

/// The timings of one workload.
#[derive(Debug, Clone, PartialEq)]
pub struct Timing {
    /// Where the figure comes from.
    pub measured: Measured,
    /// The figure, milliseconds per run.
    pub time: Summary,
    /// The calibration unit in the same rounds ([`Sample::unit_ms`]).
    pub unit: Summary,
    /// The calibration product in the same rounds.
    pub product: Summary,
    /// The calibration sweep in the same rounds.
    pub sweep: Summary,
    /// The floor ratio of each block in order: its fastest run over its fastest unit.
    pub block_floors: Vec<f64>,
    /// Round trips of `run` (kernels only).
    pub round_trip: Option<Summary>,
    /// The kernel's own times, when it reported them in every run.
    pub kernel: Option<Summary>,
    /// Round trips of `dry_run`, the protocol's own cost, when the kernel answers it.
    pub overhead: Option<Summary>,
}

impl Timing {
    /// The figure in calibration units: median time over median unit.
    pub fn ratio(&self) -> f64 {
        self.time.median / self.unit.median
    }

    /// The figure over the median calibration product alone.
    pub fn ratio_product(&self) -> f64 {
        self.time.median / self.product.median
    }

    /// The figure over the median calibration sweep alone.
    pub fn ratio_sweep(&self) -> f64 {
        self.time.median / self.sweep.median
    }

    /// The relative standard error of [`ratio`](Self::ratio): the two medians'
    /// combined in quadrature.
    pub fn uncertainty(&self) -> f64 {
        self.time.median_error().hypot(self.unit.median_error())
    }

    /// The floor in calibration units: the median over blocks of each block's fastest
    /// run over its fastest unit ([`block_floors`](Self::block_floors)). The gate
    /// compares this figure ([`stats`]).
    pub fn floor_ratio(&self) -> f64 {
        match stats::BlockFloors::of(&self.block_floors) {
            Some(b) => b.median,
            None => self.time.min / self.unit.min,
        }
    }

    /// The relative noise of [`floor_ratio`](Self::floor_ratio): how far the block
    /// floors lie apart ([`stats::BlockFloors::noise`]); with a single block, the two
    /// floors' fastest-to-third gaps combined in quadrature.
    pub fn floor_noise(&self) -> f64 {
        match stats::BlockFloors::of(&self.block_floors) {
            Some(b) => b.noise(),
            None => self.time.floor_noise().hypot(self.unit.floor_noise()),
        }
    }

    /// Median round trip minus median dry-run round trip: the round trip with the
    /// protocol's cost taken out (kernels that answer `dry_run` only).
    pub fn net_ms(&self) -> Option<f64> {
        Some(self.round_trip?.median - self.overhead?.median)
    }
}

/// How one workload ended.
#[derive(Debug, Clone, PartialEq)]
pub enum Outcome {
    /// Timed.
    Timed(Box<Timing>),
    /// The kernel declined it (`-32001`).
    Skipped(String),
    /// It could not be timed: the kernel failed, or the run stopped before it.
    Error(String),
}

/// One workload's result.
#[derive(Debug, Clone, PartialEq)]
pub struct WorkloadResult {
    /// The workload.
    pub workload: Workload,
    /// Its outcome.
    pub outcome: Outcome,
}

/// Which target a report is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum TargetKind {
    /// The library's reference.
    Reference,
    /// A team's kernel.
    Kernel,
}

impl TargetKind {
    /// The name in reports and in the JSON document.
    pub fn name(self) -> &'static str {
        match self {
            TargetKind::Reference => "reference",
            TargetKind::Kernel => "kernel",
        }
    }
}

/// A bench run.
#[derive(Debug, Clone, PartialEq)]
pub struct BenchReport {
    /// What was timed.
    pub target: TargetKind,
    /// Its name: `posconform reference <version>`, or the kernel's name and version.
    pub subject: String,
    /// The options.
    pub options: BenchOptions,
    /// Every calibration sample of the run, in order.
    pub calibration: Vec<Sample>,
    /// The headroom probes, [`PROBES`] at the start of every block.
    pub probes: Vec<Probe>,
    /// Whether the kernel answered `dry_run` (`None`: never asked: the reference, or a
    /// kernel in process).
    pub dry_run: Option<bool>,
    /// One result per workload, in order.
    pub workloads: Vec<WorkloadResult>,
    /// Run-level notes.
    pub notes: Vec<String>,
}

impl BenchReport {
    /// Whether any workload could not be timed (the run is then incomplete).
    pub fn has_errors(&self) -> bool {
        self.workloads
            .iter()
            .any(|w| matches!(w.outcome, Outcome::Error(_)))
    }

    /// The machine's headroom over the run ([`calibrate`]): the median product alone
    /// over the median concurrent products of the probes. `None` without probes.
    pub fn headroom(&self) -> Option<f64> {
        let of = |f: fn(&Probe) -> f64| {
            Summary::of(&self.probes.iter().map(f).collect::<Vec<_>>()).map(|s| s.median)
        };
        let (alone, together) = (of(|p| p.alone_ms)?, of(|p| p.together_ms)?);
        (together > 0.0).then_some(alone / together)
    }

    /// The summary of a calibration quantity over the whole run.
    pub fn calibration_summary(&self, of: impl Fn(&Sample) -> f64) -> Option<Summary> {
        let values: Vec<f64> = self.calibration.iter().map(of).collect();
        Summary::of(&values)
    }
}

/// Whether the build is optimised (debug builds are tens of times slower, and their
/// ratios differ too: the gate refuses to compare across build kinds).
pub fn build_kind() -> &'static str {
    if cfg!(debug_assertions) {
        "debug"
    } else {
        "release"
    }
}

/// Progress of a bench: `(done, total)` steps, one step a workload's share of one
/// block.
pub type BenchProgress<'a> = dyn FnMut(usize, usize) + 'a;

/// The timed rounds of block `block` of `blocks` when `repeat` rounds are shared out:
/// as equal as they can be, the earlier blocks taking the remainder.
pub fn rounds_in_block(repeat: usize, blocks: usize, block: usize) -> usize {
    repeat / blocks + usize::from(block < repeat % blocks)
}

/// Times `workloads` on `target`. Never fails: a workload that cannot be timed is an
/// [`Outcome::Error`], and a kernel that cannot be restarted stops the run (the rest
/// are reported as not run).
///
/// The run goes in blocks (module docs): in each block every workload takes its share
/// of the rounds in turn, so a workload's blocks lie apart in time, and the machine
/// states they meet differ as much as those of separate runs do.
pub fn measure(
    mut target: Target<'_>,
    subject: String,
    workloads: Vec<Workload>,
    options: &BenchOptions,
    progress: &mut BenchProgress<'_>,
) -> BenchReport {
    let repeat = options.repeat.max(1);
    let options = BenchOptions {
        warmup: options.warmup,
        repeat,
        blocks: options.blocks.clamp(1, repeat),
    };
    let mut bench = Bench {
        calibration: Calibration::new(),
        samples: Vec::new(),
        dry_run: None,
        asked_dry_run: true,
        notes: Vec::new(),
        options,
    };
    // Pages touched and clocks up before anything is timed.
    for _ in 0..options.warmup.max(1) {
        bench.calibration.sample();
    }
    let kind = match target {
        Target::Reference => TargetKind::Reference,
        Target::Kernel(_) | Target::InProcess(_) => TargetKind::Kernel,
    };
    if let Target::InProcess(_) = target {
        bench.dry_run = Some(false);
        bench.asked_dry_run = false;
    }
    let total = workloads.len() * options.blocks;
    let mut stopped: Option<String> = None;
    let mut slots: Vec<(Workload, Slot)> =
        workloads.into_iter().map(|w| (w, Slot::Waiting)).collect();
    let mut done = 0;
    let mut probes = Vec::with_capacity(options.blocks * PROBES);
    for block in 0..options.blocks {
        let rounds = rounds_in_block(options.repeat, options.blocks, block);
        if stopped.is_none() {
            std::thread::sleep(PROBE_PAUSE);
            probes.extend((0..PROBES).map(|_| bench.calibration.probe()));
        }
        for (workload, slot) in &mut slots {
            progress(done, total);
            done += 1;
            if matches!(slot, Slot::Ended(_)) {
                continue;
            }
            if stopped.is_none() {
                if let Some(signal) = crate::kernel::stdio::interrupted() {
                    stopped = Some(format!(
                        "posconform received signal {signal}; the run stopped"
                    ));
                }
            }
            if let Some(why) = &stopped {
                *slot = Slot::Ended(Outcome::Error(format!("not run: {why}")));
                continue;
            }
            let mut rounds_of = match std::mem::replace(slot, Slot::Waiting) {
                Slot::Running(r) => r,
                _ => Box::default(),
            };
            let result = match &mut target {
                Target::Reference => bench
                    .time_reference(workload, &mut rounds_of, block, rounds)
                    .map_err(|o| (o, None)),
                Target::Kernel(kernel) | Target::InProcess(kernel) => {
                    let result =
                        bench.time_kernel(&mut **kernel, workload, &mut rounds_of, block, rounds);
                    if let Err((_, Some(kind))) = &result {
                        if let Some(why) = recover(&mut **kernel, *kind, &workload.name) {
                            bench.notes.push(why.clone());
                            stopped = Some(why);
                        }
                    }
                    result
                }
            };
            *slot = match result {
                Ok(()) => Slot::Running(rounds_of),
                Err((outcome, _)) => Slot::Ended(outcome),
            };
        }
    }
    progress(total, total);
    let results = slots
        .into_iter()
        .map(|(workload, slot)| {
            let outcome = match slot {
                Slot::Ended(outcome) => outcome,
                Slot::Running(rounds) => bench.finish(&workload, &rounds, kind),
                Slot::Waiting => Outcome::Error("not run".into()),
            };
            WorkloadResult { workload, outcome }
        })
        .collect();
    BenchReport {
        target: kind,
        subject,
        options,
        calibration: bench.samples,
        probes,
        dry_run: bench.dry_run.filter(|_| bench.asked_dry_run),
        workloads: results,
        notes: bench.notes,
    }
}

/// Where a workload stands during a run.
enum Slot {
    /// Not started.
    Waiting,
    /// Timed in at least one block.
    Running(Box<Rounds>),
    /// Finished early: skipped or failed.
    Ended(Outcome),
}

/// The timed rounds of one workload so far, each with its block.
#[derive(Default)]
struct Rounds {
    /// The inputs as sent (built once).
    inputs: Option<Arrays>,
    /// The shapes of the kernel's answer, for the dry run.
    shapes: BTreeMap<String, ArraySpec>,
    /// The reference's times (in process) or the round trips (kernels).
    times: Vec<f64>,
    /// The kernel's own times, when it reported one.
    own: Vec<f64>,
    /// The dry runs' round trips.
    overhead: Vec<f64>,
    /// The calibration sample of each round.
    samples: Vec<Sample>,
    /// The block of each round.
    block: Vec<usize>,
}

/// After a kernel failure of `kind`: restarts a process that needs it. `Some(reason)`
/// when the run must stop.
fn recover(kernel: &mut dyn Kernel, kind: KernelErrorKind, name: &str) -> Option<String> {
    match kind {
        KernelErrorKind::Interrupted => Some(format!(
            "posconform received a signal during {name}; the run stopped"
        )),
        KernelErrorKind::CouldNotStart | KernelErrorKind::Handshake => Some(format!(
            "the kernel could not be started again ({name}); the run stopped"
        )),
        kind if kind.needs_restart() => kernel
            .restart()
            .err()
            .map(|e| format!("the kernel could not be restarted after {name}: {e}")),
        _ => None,
    }
}

/// The state of one bench run.
struct Bench {
    calibration: Calibration,
    samples: Vec<Sample>,
    /// `Some(false)` once dry runs are known not to work (or not to apply).
    dry_run: Option<bool>,
    /// Whether dry runs apply at all (not for the reference or in process).
    asked_dry_run: bool,
    notes: Vec<String>,
    options: BenchOptions,
}

fn ms(started: Instant) -> f64 {
    started.elapsed().as_secs_f64() * 1e3
}

/// The inputs as sent to a kernel computing in `dtype` (float arrays in it), as
/// `check` sends them.
fn inputs_in(inputs: &Arrays, dtype: Dtype) -> Arrays {
    inputs
        .iter()
        .map(|(n, t)| {
            let t = if t.dtype().is_float() {
                Tensor::from_f64(dtype, t.view().to_owned())
            } else {
                t.clone()
            };
            (n.clone(), t)
        })
        .collect()
}

/// The calibration summaries of a block of samples.
fn block(samples: &[Sample]) -> Option<(Summary, Summary, Summary)> {
    let of = |f: fn(&Sample) -> f64| Summary::of(&samples.iter().map(f).collect::<Vec<_>>());
    Some((
        of(Sample::unit_ms)?,
        of(|s| s.product_ms)?,
        of(|s| s.sweep_ms)?,
    ))
}

/// A workload's failure: its outcome, and the kind of the kernel's failure when it
/// could not answer.
type Failure = (Outcome, Option<KernelErrorKind>);

impl Bench {
    /// Untimed runs before a workload's share of a block: `warmup` before its first,
    /// one before each later one (the other workloads ran in between).
    fn warm_runs(&self, first: bool) -> usize {
        if first {
            self.options.warmup
        } else {
            self.options.warmup.min(1)
        }
    }

    fn time_reference(
        &mut self,
        workload: &Workload,
        rounds: &mut Rounds,
        block: usize,
        count: usize,
    ) -> std::result::Result<(), Outcome> {
        let case = &workload.case;
        let first = block == 0;
        if rounds.inputs.is_none() {
            rounds.inputs = Some(
                case.inputs()
                    .map_err(|e| Outcome::Error(format!("cannot build inputs: {e}")))?,
            );
        }
        let inputs = rounds.inputs.as_ref().expect("built above");
        let failed = |e: Error| Outcome::Error(format!("the reference failed: {e}"));
        for _ in 0..self.warm_runs(first) {
            reference::expected(case, inputs).map_err(failed)?;
        }
        for _ in 0..count {
            rounds.samples.push(self.calibration.sample());
            let started = Instant::now();
            let result = reference::expected(case, inputs);
            rounds.times.push(ms(started));
            rounds.block.push(block);
            drop(result.map_err(failed)?);
        }
        Ok(())
    }

    /// Times one workload's share of a block on a kernel.
    fn time_kernel(
        &mut self,
        kernel: &mut dyn Kernel,
        workload: &Workload,
        rounds: &mut Rounds,
        block: usize,
        count: usize,
    ) -> std::result::Result<(), Failure> {
        let case = &workload.case;
        let first = block == 0;
        let dtype = workload.dtype();
        if rounds.inputs.is_none() {
            rounds.inputs = Some(inputs_in(
                &case
                    .inputs()
                    .map_err(|e| (Outcome::Error(format!("cannot build inputs: {e}")), None))?,
                dtype,
            ));
        }
        let inputs = rounds.inputs.as_ref().expect("built above");
        let failed = |e: Error| {
            let kind = e.kernel_kind().unwrap_or(KernelErrorKind::Failed);
            (Outcome::Error(e.to_string()), Some(kind))
        };
        let declined = |reason: String| {
            (
                Outcome::Skipped(format!("the kernel declined: {reason}")),
                None,
            )
        };
        // At least one untimed run first: its answer tells the dry run what to send.
        let warm = self.warm_runs(first).max(usize::from(first));
        for _ in 0..warm {
            match kernel.run(case, dtype, inputs).map_err(failed)? {
                Answer::Outputs { outputs, .. } => {
                    rounds.shapes = outputs
                        .iter()
                        .map(|(name, t)| {
                            let spec = ArraySpec {
                                dtype: t.dtype(),
                                shape: t.shape().to_vec(),
                            };
                            (name.clone(), spec)
                        })
                        .collect();
                }
                Answer::Unsupported(reason) => return Err(declined(reason)),
            }
        }
        for _ in 0..count {
            rounds.samples.push(self.calibration.sample());
            rounds.block.push(block);
            let started = Instant::now();
            let answer = kernel.run(case, dtype, inputs);
            rounds.times.push(ms(started));
            match answer.map_err(failed)? {
                Answer::Outputs { elapsed_ms, .. } => {
                    if let Some(t) = elapsed_ms.filter(|t| t.is_finite() && *t >= 0.0) {
                        rounds.own.push(t);
                    }
                }
                Answer::Unsupported(reason) => return Err(declined(reason)),
            }
            if self.dry_run != Some(false) {
                let started = Instant::now();
                match kernel.dry_run(case, dtype, inputs, &rounds.shapes) {
                    Ok(Some(_)) => {
                        rounds.overhead.push(ms(started));
                        self.dry_run = Some(true);
                    }
                    Ok(None) => {
                        self.dry_run = Some(false);
                        self.notes.push(
                            "the kernel does not answer `dry_run`: the protocol's own cost is not measured (docs/protocol.md, \"Dry run\")".into(),
                        );
                    }
                    Err(e) => {
                        self.dry_run = Some(false);
                        self.notes.push(format!(
                            "the kernel could not answer `dry_run` ({e}); the protocol's own cost is not measured"
                        ));
                        if let Some(kind) = e.kernel_kind().filter(|k| k.needs_restart()) {
                            if let Some(why) = recover(kernel, kind, &workload.name) {
                                return Err((
                                    Outcome::Error(why),
                                    Some(KernelErrorKind::CouldNotStart),
                                ));
                            }
                            // The restarted process answers the remaining runs.
                        }
                        rounds.overhead.clear();
                    }
                }
            }
        }
        Ok(())
    }

    /// The timing of a workload from all its rounds.
    fn finish(&mut self, workload: &Workload, rounds: &Rounds, kind: TargetKind) -> Outcome {
        self.samples.extend_from_slice(&rounds.samples);
        let count = rounds.times.len();
        let kernel_times = (rounds.own.len() == count).then_some(rounds.own.as_slice());
        if kernel_times.is_none() && !rounds.own.is_empty() {
            self.notes.push(format!(
                "{}: the kernel reported its own time in {} of {} runs; the round trip is used",
                workload.name,
                rounds.own.len(),
                count
            ));
        }
        let is_kernel = kind == TargetKind::Kernel;
        let overhead = (rounds.overhead.len() == count).then_some(rounds.overhead.as_slice());
        let (measured, times) = match (is_kernel, kernel_times) {
            (false, _) => (Measured::InProcess, rounds.times.as_slice()),
            (true, Some(own)) => (Measured::Kernel, own),
            (true, None) => (Measured::RoundTrip, rounds.times.as_slice()),
        };
        let (Some(time), Some((unit, product, sweep))) =
            (Summary::of(times), block(&rounds.samples))
        else {
            return Outcome::Error("no usable timings (a clock gave no finite time)".into());
        };
        // Summaries hold finite values only.
        if unit.median <= 0.0 {
            return Outcome::Error("the calibration took no measurable time".into());
        }
        // Each block's fastest run and fastest unit, in one pass over the rounds.
        let blocks = rounds.block.last().map_or(0, |b| b + 1);
        let mut fastest = vec![(f64::INFINITY, f64::INFINITY); blocks];
        for ((&b, &t), sample) in rounds.block.iter().zip(times).zip(&rounds.samples) {
            fastest[b].0 = fastest[b].0.min(t);
            fastest[b].1 = fastest[b].1.min(sample.unit_ms());
        }
        let block_floors = fastest
            .into_iter()
            .map(|(t, u)| t / u)
            .filter(|floor| floor.is_finite())
            .collect();
        Outcome::Timed(Box::new(Timing {
            measured,
            time,
            unit,
            product,
            sweep,
            block_floors,
            round_trip: is_kernel.then(|| Summary::of(&rounds.times)).flatten(),
            kernel: kernel_times.and_then(Summary::of),
            overhead: overhead.and_then(Summary::of),
        }))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn shapes_parse_presets_and_the_written_form() {
        let s: BenchShape = "L128_M0_d64_h4".parse().unwrap();
        assert_eq!(
            (s.query_len, s.memory_len, s.head_dim, s.heads),
            (128, 0, 64, 4)
        );
        assert_eq!(s.to_string(), "L128_M0_d64_h4");
        assert_eq!(
            "medium".parse::<BenchShape>().unwrap().to_string(),
            "L128_M128_d64_h4"
        );
        for bad in [
            "",
            "L1",
            "M1_L1_d2_h1",
            "L0_M0_d2_h1",
            "L1_M0_d3_h1",
            "L1_M0_d2_h0",
            "Lx_M0_d2_h1",
            "L1_M0_d2_h1_",
            "L99999999_M0_d2_h1",
        ] {
            let e = bad.parse::<BenchShape>().unwrap_err().to_string();
            assert!(e.contains("shape"), "{bad}: {e}");
        }
    }

    #[test]
    fn every_scheme_and_operation_builds_at_every_preset() {
        for (_, shape) in PRESETS {
            for &scheme in Scheme::ALL {
                for operation in OperationKind::ALL {
                    let cases = workload_cases(scheme, operation, *shape, Dtype::F32).unwrap();
                    assert!(!cases.is_empty());
                    for case in cases {
                        assert_eq!(case.operation.kind(), operation);
                        assert_eq!(case.dtype, Dtype::F32);
                    }
                }
            }
        }
    }

    #[test]
    fn decode_chunks_cover_the_queries() {
        let shape: BenchShape = "L40_M3_d2_h1".parse().unwrap();
        let case =
            &workload_cases(Scheme::Alibi, OperationKind::Decode, shape, Dtype::F64).unwrap()[0];
        let Operation::Decode {
            tokens,
            prefill,
            chunks,
        } = &case.operation
        else {
            panic!("not a decode case");
        };
        assert_eq!((*tokens, *prefill), (43, 3));
        assert_eq!(chunks, &vec![16, 16, 8]);
    }

    #[test]
    fn blocks_share_out_every_round() {
        for repeat in 1..40 {
            for blocks in 1..=repeat {
                let shares: Vec<usize> = (0..blocks)
                    .map(|b| rounds_in_block(repeat, blocks, b))
                    .collect();
                assert_eq!(shares.iter().sum::<usize>(), repeat, "{repeat}/{blocks}");
                let (lo, hi) = (shares.iter().min().unwrap(), shares.iter().max().unwrap());
                assert!(hi - lo <= 1, "{repeat}/{blocks}: {shares:?}");
            }
        }
    }

    /// The reference, recording which workload each run was for.
    struct Recording {
        inner: crate::kernel::ReferenceKernel,
        seen: Vec<String>,
    }

    impl Kernel for Recording {
        fn describe(&mut self) -> Result<KernelInfo> {
            self.inner.describe()
        }

        fn run(&mut self, case: &Case, dtype: Dtype, inputs: &Arrays) -> Result<Answer> {
            self.seen.push(case.id.clone());
            self.inner.run(case, dtype, inputs)
        }
    }

    /// Every workload takes its turn in every block: with warm-up 2, blocks 3 and 7
    /// rounds, the runs of two workloads go A×(2+3) B×(2+3), then A×(1+2) B×(1+2)
    /// twice; each workload reports one floor per block, the median of which is its
    /// floor ratio.
    #[test]
    fn workloads_take_turns_block_by_block() {
        let shape: BenchShape = "L4_M2_d4_h1".parse().unwrap();
        let workloads: Vec<Workload> = [Scheme::Rotary, Scheme::Alibi]
            .iter()
            .map(|&scheme| {
                let case = workload_cases(scheme, OperationKind::Scores, shape, Dtype::F64)
                    .unwrap()
                    .remove(0);
                Workload {
                    name: case.id.clone(),
                    shape,
                    case,
                }
            })
            .collect();
        let (a, b) = (workloads[0].case.id.clone(), workloads[1].case.id.clone());
        let mut kernel = Recording {
            inner: crate::kernel::ReferenceKernel::default(),
            seen: Vec::new(),
        };
        let options = BenchOptions {
            warmup: 2,
            repeat: 7,
            blocks: 3,
        };
        let report = measure(
            Target::InProcess(&mut kernel),
            "recording".into(),
            workloads,
            &options,
            &mut |_, _| {},
        );
        let mut expected = Vec::new();
        for share in [5, 3, 3] {
            expected.extend(std::iter::repeat_n(a.clone(), share));
            expected.extend(std::iter::repeat_n(b.clone(), share));
        }
        assert_eq!(kernel.seen, expected);
        for result in &report.workloads {
            let Outcome::Timed(t) = &result.outcome else {
                panic!("{:?}", result.outcome);
            };
            assert_eq!(t.time.count, 7);
            assert_eq!(t.block_floors.len(), 3);
            let floors = stats::BlockFloors::of(&t.block_floors).unwrap();
            assert_eq!(t.floor_ratio(), floors.median);
            assert_eq!(t.floor_noise(), floors.noise());
        }
        assert_eq!(report.calibration.len(), 14);
    }
}
