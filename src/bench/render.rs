//! The bench reports: a table for people and the versioned JSON document that CI keeps
//! as the next run's baseline (its layout: docs/bench.md).

use std::fmt::Write as _;

use serde::Serialize;

use super::calibrate::{self, CALIBRATION, PRODUCT_SIZE, SWEEP_BYTES};
use super::gate::{Gate, Verdict};
use super::stats::Summary;
use super::{build_kind, BenchReport, Outcome, Timing};
use crate::report::{printable, EXIT_COULD_NOT_RUN, EXIT_NONCONFORMING};

/// The value of `"format"`, naming the document type.
pub const FORMAT: &str = "posconform.bench";
/// The value of `"version"`: it changes only when a key is removed or changes meaning.
pub const VERSION: u32 = 2;
/// Exit status: no regression the noise supports (and every workload timed).
pub const EXIT_NO_REGRESSION: u8 = 0;
/// Exit status: at least one regression beyond its threshold that the noise supports.
pub const EXIT_REGRESSED: u8 = EXIT_NONCONFORMING;

/// The exit status of a bench: 2 when a workload could not be timed or none was
/// (whatever else happened), 1 when the gate found a regression, 0 otherwise.
pub fn exit_code(report: &BenchReport, gate: Option<&Gate>) -> u8 {
    let timed = report
        .workloads
        .iter()
        .any(|w| matches!(w.outcome, Outcome::Timed(_)));
    if report.has_errors() || !timed {
        EXIT_COULD_NOT_RUN
    } else if gate.is_some_and(Gate::failed) {
        EXIT_REGRESSED
    } else {
        EXIT_NO_REGRESSION
    }
}

/// A number, or `null` when it is not finite (the document never holds non-finite
/// numbers: every figure is a median of finite times over a positive unit).
#[derive(Clone, Copy)]
struct Number(f64);

impl Serialize for Number {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        if self.0.is_finite() {
            s.serialize_f64(self.0)
        } else {
            s.serialize_none()
        }
    }
}

#[derive(Serialize)]
struct Document<'a> {
    format: &'static str,
    version: u32,
    generator: String,
    build: &'static str,
    target: &'static str,
    subject: &'a str,
    settings: Settings,
    calibration: CalibrationDocument,
    dry_run: Option<bool>,
    notes: &'a [String],
    workloads: Vec<WorkloadDocument<'a>>,
    gate: Option<GateDocument<'a>>,
    exit_code: u8,
}

#[derive(Serialize)]
struct Settings {
    warmup: usize,
    repeat: usize,
    blocks: usize,
}

#[derive(Serialize)]
struct CalibrationDocument {
    name: &'static str,
    product_size: usize,
    sweep_bytes: usize,
    samples: usize,
    product_ms: Option<Stats>,
    sweep_ms: Option<Stats>,
    unit_ms: Option<Stats>,
    cores: usize,
    headroom_probes: usize,
    headroom: Option<Number>,
}

#[derive(Serialize)]
struct Stats {
    runs: usize,
    median: Number,
    min: Number,
    max: Number,
    q1: Number,
    q3: Number,
    third: Number,
    spread: Number,
}

impl From<Summary> for Stats {
    fn from(s: Summary) -> Self {
        Stats {
            runs: s.count,
            median: Number(s.median),
            min: Number(s.min),
            max: Number(s.max),
            q1: Number(s.q1),
            q3: Number(s.q3),
            third: Number(s.third),
            spread: Number(s.spread()),
        }
    }
}

#[derive(Serialize)]
struct WorkloadDocument<'a> {
    name: &'a str,
    target: &'static str,
    scheme: &'static str,
    operation: &'static str,
    shape: String,
    dtype: &'static str,
    status: &'static str,
    reason: Option<&'a str>,
    measured: Option<&'static str>,
    time_ms: Option<Stats>,
    unit_ms: Option<Stats>,
    ratio: Option<Number>,
    ratio_product: Option<Number>,
    ratio_sweep: Option<Number>,
    uncertainty: Option<Number>,
    floor_ratio: Option<Number>,
    floor_noise: Option<Number>,
    block_floors: Option<Vec<Number>>,
    round_trip_ms: Option<Stats>,
    kernel_ms: Option<Stats>,
    overhead_ms: Option<Stats>,
    net_ms: Option<Number>,
}

#[derive(Serialize)]
struct GateDocument<'a> {
    baseline: String,
    threshold: Number,
    counts: GateCounts,
    changes: Vec<ChangeDocument<'a>>,
}

#[derive(Serialize)]
struct GateCounts {
    regressed: usize,
    too_noisy: usize,
    improved: usize,
    unchanged: usize,
    new: usize,
    missing: usize,
    not_comparable: usize,
}

#[derive(Serialize)]
struct ChangeDocument<'a> {
    name: &'a str,
    target: &'static str,
    verdict: &'a Verdict,
    threshold: Number,
    baseline_floor_ratio: Option<Number>,
    baseline_floor_noise: Option<Number>,
    floor_ratio: Option<Number>,
    floor_noise: Option<Number>,
    change: Option<Number>,
    low: Option<Number>,
    high: Option<Number>,
    reason: Option<&'a str>,
}

fn gate_counts(gate: &Gate) -> GateCounts {
    GateCounts {
        regressed: gate.count(&Verdict::Regressed),
        too_noisy: gate.count(&Verdict::TooNoisy),
        improved: gate.count(&Verdict::Improved),
        unchanged: gate.count(&Verdict::Unchanged),
        new: gate.count(&Verdict::New),
        missing: gate.count(&Verdict::Missing),
        not_comparable: gate.count(&Verdict::NotComparable),
    }
}

/// The JSON document of `report` (and of the gate, when there was a baseline), pretty
/// printed, ending in a newline.
pub fn json(report: &BenchReport, gate: Option<&Gate>) -> String {
    let workloads = report
        .workloads
        .iter()
        .map(|result| {
            let w = &result.workload;
            let (status, reason, timing) = match &result.outcome {
                Outcome::Timed(t) => ("timed", None, Some(&**t)),
                Outcome::Skipped(why) => ("skipped", Some(why.as_str()), None),
                Outcome::Error(why) => ("error", Some(why.as_str()), None),
            };
            WorkloadDocument {
                name: &w.name,
                target: report.target.name(),
                scheme: w.scheme().name(),
                operation: w.operation().name(),
                shape: w.shape.to_string(),
                dtype: w.dtype().name(),
                status,
                reason,
                measured: timing.map(|t| t.measured.name()),
                time_ms: timing.map(|t| t.time.into()),
                unit_ms: timing.map(|t| t.unit.into()),
                ratio: timing.map(|t| Number(t.ratio())),
                ratio_product: timing.map(|t| Number(t.ratio_product())),
                ratio_sweep: timing.map(|t| Number(t.ratio_sweep())),
                uncertainty: timing.map(|t| Number(t.uncertainty())),
                floor_ratio: timing.map(|t| Number(t.floor_ratio())),
                floor_noise: timing.map(|t| Number(t.floor_noise())),
                block_floors: timing.map(|t| t.block_floors.iter().copied().map(Number).collect()),
                round_trip_ms: timing.and_then(|t| t.round_trip.map(Stats::from)),
                kernel_ms: timing.and_then(|t| t.kernel.map(Stats::from)),
                overhead_ms: timing.and_then(|t| t.overhead.map(Stats::from)),
                net_ms: timing.and_then(Timing::net_ms).map(Number),
            }
        })
        .collect();
    let gate_document = gate.map(|g| GateDocument {
        baseline: g.baseline.display().to_string(),
        threshold: Number(g.threshold),
        counts: gate_counts(g),
        changes: g
            .changes
            .iter()
            .map(|c| ChangeDocument {
                name: &c.name,
                target: c.target.name(),
                verdict: &c.verdict,
                threshold: Number(c.threshold),
                baseline_floor_ratio: c.baseline.map(|b| Number(b.0)),
                baseline_floor_noise: c.baseline.map(|b| Number(b.1)),
                floor_ratio: c.now.map(|n| Number(n.0)),
                floor_noise: c.now.map(|n| Number(n.1)),
                change: c.range.map(|r| Number(r.change)),
                low: c.range.map(|r| Number(r.low)),
                high: c.range.map(|r| Number(r.high)),
                reason: c.reason.as_deref(),
            })
            .collect(),
    });
    let document = Document {
        format: FORMAT,
        version: VERSION,
        generator: format!("posconform {}", env!("CARGO_PKG_VERSION")),
        build: build_kind(),
        target: report.target.name(),
        subject: &report.subject,
        settings: Settings {
            warmup: report.options.warmup,
            repeat: report.options.repeat,
            blocks: report.options.blocks,
        },
        calibration: CalibrationDocument {
            name: CALIBRATION,
            product_size: PRODUCT_SIZE,
            sweep_bytes: SWEEP_BYTES,
            samples: report.calibration.len(),
            product_ms: report
                .calibration_summary(|s| s.product_ms)
                .map(Stats::from),
            sweep_ms: report.calibration_summary(|s| s.sweep_ms).map(Stats::from),
            unit_ms: report.calibration_summary(|s| s.unit_ms()).map(Stats::from),
            cores: calibrate::cores(),
            headroom_probes: report.probes.len(),
            headroom: report.headroom().map(Number),
        },
        dry_run: report.dry_run,
        notes: &report.notes,
        workloads,
        gate: gate_document,
        exit_code: exit_code(report, gate),
    };
    // Strings, integers, booleans and finite-or-null numbers: serialisation cannot
    // fail; a panic here would be a bug in this module.
    let mut text = serde_json::to_string_pretty(&document).expect("a bench report serialises");
    text.push('\n');
    text
}

/// Milliseconds with three significant decimals at any scale.
fn millis(x: f64) -> String {
    if x >= 100.0 {
        format!("{x:.1}")
    } else if x >= 1.0 {
        format!("{x:.3}")
    } else {
        format!("{x:.4}")
    }
}

fn percent(x: f64) -> String {
    if x.is_finite() {
        format!("{:+.1}%", x * 100.0)
    } else if x > 0.0 {
        "+inf".into()
    } else {
        "-inf".into()
    }
}

/// The report for people: the calibration, one line per workload, and the gate's
/// table of changes (every row but the unchanged ones, which are counted).
pub fn text(report: &BenchReport, gate: Option<&Gate>) -> String {
    let mut out = String::new();
    let timed = report
        .workloads
        .iter()
        .filter(|w| matches!(w.outcome, Outcome::Timed(_)))
        .count();
    let what = match report.target {
        super::TargetKind::Reference => "the reference of",
        super::TargetKind::Kernel => "kernel",
    };
    let _ = writeln!(
        out,
        "posconform bench: {what} {} ({} build), {} workloads, {} warm-up + {} timed runs each in {} blocks",
        printable(&report.subject),
        build_kind(),
        report.workloads.len(),
        report.options.warmup,
        report.options.repeat,
        report.options.blocks
    );
    if let (Some(p), Some(s), Some(u)) = (
        report.calibration_summary(|s| s.product_ms),
        report.calibration_summary(|s| s.sweep_ms),
        report.calibration_summary(|s| s.unit_ms()),
    ) {
        let _ = writeln!(
            out,
            "calibration {CALIBRATION}: product {} ms, sweep {} ms, unit {} ms (medians of {} rounds; unit spread {:.1}%)",
            millis(p.median),
            millis(s.median),
            millis(u.median),
            u.count,
            u.spread() * 100.0
        );
    }
    if let Some(h) = report.headroom() {
        let _ = writeln!(
            out,
            "headroom {h:.2}: the product alone over the product on all {} cores at once (near 1 when the other cores are free)",
            calibrate::cores()
        );
    }
    let kernel = report.target == super::TargetKind::Kernel;
    let width = report
        .workloads
        .iter()
        .map(|w| w.workload.name.len())
        .max()
        .unwrap_or(8)
        .max(8);
    let _ = writeln!(
        out,
        "\n{:<width$}  {:<10} {:>9} {:>9} {:>9} {:>7} {:>9} {:>6} {:>9} {:>6}{}",
        "workload",
        "measured",
        "median ms",
        "min ms",
        "max ms",
        "spread",
        "ratio",
        "±2se",
        "floor",
        "±",
        if kernel {
            "   round trip ms  dry run ms"
        } else {
            ""
        }
    );
    for result in &report.workloads {
        let name = &result.workload.name;
        match &result.outcome {
            Outcome::Timed(t) => {
                let _ = write!(
                    out,
                    "{name:<width$}  {:<10} {:>9} {:>9} {:>9} {:>6.1}% {:>9.4} {:>5.1}% {:>9.4} {:>5.1}%",
                    t.measured.name(),
                    millis(t.time.median),
                    millis(t.time.min),
                    millis(t.time.max),
                    t.time.spread() * 100.0,
                    t.ratio(),
                    2.0 * t.uncertainty() * 100.0,
                    t.floor_ratio(),
                    t.floor_noise() * 100.0
                );
                if kernel {
                    let rt = t.round_trip.map_or("-".into(), |s| millis(s.median));
                    let dry = t.overhead.map_or("-".into(), |s| millis(s.median));
                    let _ = write!(out, " {rt:>15} {dry:>11}");
                }
                out.push('\n');
            }
            Outcome::Skipped(why) => {
                let _ = writeln!(out, "{name:<width$}  skipped: {}", printable(why));
            }
            Outcome::Error(why) => {
                let _ = writeln!(out, "{name:<width$}  ERROR: {}", printable(why));
            }
        }
    }
    let _ = writeln!(
        out,
        "\nratio: median time over median calibration unit of the same rounds, ±2se two standard errors;\n\
         floor: median over blocks of each block's fastest run over its fastest unit, ± half the blocks' range\n\
         (what the gate compares; docs/bench.md)"
    );
    if !report.notes.is_empty() {
        out.push_str("\nNotes\n");
        for note in &report.notes {
            let _ = writeln!(out, "  {}", printable(note));
        }
    }
    if let Some(gate) = gate {
        write_gate(&mut out, gate);
    }
    let errors = report.workloads.len()
        - timed
        - report
            .workloads
            .iter()
            .filter(|w| matches!(w.outcome, Outcome::Skipped(_)))
            .count();
    let code = exit_code(report, gate);
    let verdict = match code {
        EXIT_NO_REGRESSION if gate.is_some() => "no regression the noise supports",
        EXIT_NO_REGRESSION => "timed (no baseline given)",
        EXIT_REGRESSED => "regression",
        _ if timed == 0 => "nothing was timed",
        _ => "could not time every workload",
    };
    let _ = writeln!(
        out,
        "\n{} workloads: {timed} timed, {} skipped, {errors} could not be timed -> {verdict} (exit {code})",
        report.workloads.len(),
        report.workloads.len() - timed - errors,
    );
    out
}

fn write_gate(out: &mut String, gate: &Gate) {
    let _ = writeln!(
        out,
        "\nAgainst baseline {} (floor ratios; threshold {:.0}% unless overridden; a change counts only when its range, from the floors' noise, lies wholly beyond it)",
        printable(&gate.baseline.display().to_string()),
        gate.threshold * 100.0
    );
    let shown: Vec<_> = gate
        .changes
        .iter()
        .filter(|c| c.verdict != Verdict::Unchanged)
        .collect();
    if shown.is_empty() {
        let _ = writeln!(
            out,
            "  all {} workloads unchanged within their thresholds",
            gate.changes.len()
        );
        return;
    }
    let width = shown.iter().map(|c| c.name.len()).max().unwrap_or(8).max(8);
    let _ = writeln!(
        out,
        "  {:<width$}  {:>9} {:>9} {:>9}  {:<19} {:>9}  verdict",
        "workload", "baseline", "now", "change", "range", "threshold"
    );
    for c in shown {
        let ratio = |r: Option<(f64, f64)>| r.map_or("-".into(), |r| format!("{:.4}", r.0));
        let (change, range) = match c.range {
            Some(r) => (
                percent(r.change),
                format!("[{}, {}]", percent(r.low), percent(r.high)),
            ),
            None => ("-".into(), String::new()),
        };
        let _ = write!(
            out,
            "  {:<width$}  {:>9} {:>9} {:>9}  {:<19} {:>8.0}%  {}",
            c.name,
            ratio(c.baseline),
            ratio(c.now),
            change,
            range,
            c.threshold * 100.0,
            c.verdict.label()
        );
        if let Some(why) = &c.reason {
            let _ = write!(out, " ({})", printable(why));
        }
        out.push('\n');
    }
    let _ = writeln!(
        out,
        "  {} regressed, {} too noisy to judge, {} improved, {} unchanged, {} new, {} missing, {} not comparable",
        gate.count(&Verdict::Regressed),
        gate.count(&Verdict::TooNoisy),
        gate.count(&Verdict::Improved),
        gate.count(&Verdict::Unchanged),
        gate.count(&Verdict::New),
        gate.count(&Verdict::Missing),
        gate.count(&Verdict::NotComparable)
    );
}
