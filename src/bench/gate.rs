//! The regression gate: a bench run against a baseline (the JSON document of an
//! earlier run), workload by workload, on the machine-portable floor ratios
//! ([`super::Timing::floor_ratio`]).
//!
//! For a workload with floor ratio `r ± u` now and `b ± v` in the baseline (`u`, `v`
//! the relative floor noise, [`super::stats`]), the change is `r/b - 1` and its range
//! runs from `r(1 - u) / (b(1 + v)) - 1` to `r(1 + u) / (b(1 - v)) - 1`. With threshold
//! `t`:
//!
//! - **regressed** when the whole range lies above `t`: the noise supports the
//!   regression;
//! - **too noisy to judge** when the range reaches above `t` but does not lie wholly
//!   above it: a regression can be neither shown nor ruled out;
//! - **improved** when the whole range lies below `1/(1+t) - 1` (faster by the same
//!   factor);
//! - **unchanged** otherwise.
//!
//! The machine's headroom ([`super::calibrate`]) is compared too: a kernel on several
//! threads slows down far more than the calibration when other processes hold cores.
//! With headroom `hb` in the baseline and `hn` now, a slowdown by up to `hb/hn` (when
//! more than 1) may be the machine's rather than the kernel's (a kernel on every core
//! slows down as the concurrent probe does), so a *regressed* verdict stands only when
//! `(1 + low)·hn/hb - 1` still lies above `t`, and otherwise becomes *too noisy to
//! judge*, saying why; likewise an *improved* one only when `(1 + high)·hn/hb - 1` still
//! lies below `1/(1+t) - 1` (when `hn > hb`).
//!
//! Only *regressed* fails the gate (exit 1). A workload in one run and not the other is
//! *new* or *missing*; one measured differently (the kernel's own time in one run, the
//! round trip in the other) is *not comparable*. None of these fails the gate.

use std::path::{Path, PathBuf};

use serde_json::Value;

use super::{
    build_kind, calibrate::CALIBRATION, render, BenchReport, Measured, Outcome, TargetKind,
};
use crate::error::{Error, Result};
use crate::run::select::IdPattern;

/// The threshold when none is given: 25% slower (our choice, for shared CI machines).
pub const DEFAULT_THRESHOLD: f64 = 0.25;
/// The largest threshold accepted (1000%).
pub const MAX_THRESHOLD: f64 = 10.0;
/// The largest baseline file read.
const MAX_BASELINE_BYTES: u64 = 256 << 20;

/// Thresholds per workload: the first override whose pattern matches the workload's
/// name, else the default.
#[derive(Debug, Clone, PartialEq)]
pub struct Thresholds {
    /// The threshold of workloads no override names (a fraction: 0.25 is 25%).
    pub default: f64,
    /// `(pattern, threshold)` pairs, tried in order.
    pub overrides: Vec<(IdPattern, f64)>,
}

impl Default for Thresholds {
    fn default() -> Self {
        Thresholds {
            default: DEFAULT_THRESHOLD,
            overrides: Vec::new(),
        }
    }
}

impl Thresholds {
    /// The threshold for the workload called `name`.
    pub fn for_name(&self, name: &str) -> f64 {
        self.overrides
            .iter()
            .find(|(pattern, _)| pattern.matches(name))
            .map_or(self.default, |(_, t)| *t)
    }
}

/// A threshold written as a fraction (`0.25`) or a percentage (`25%`), more than 0 and
/// at most [`MAX_THRESHOLD`].
pub fn parse_threshold(text: &str) -> Result<f64> {
    let bad = || {
        Error::param(
            "threshold",
            "a fraction or a percentage more than 0 and at most 1000% (0.25 or 25%)",
            format!("{text:?}"),
        )
    };
    let trimmed = text.trim();
    let value = match trimmed.strip_suffix('%') {
        Some(percent) => percent.trim().parse::<f64>().map_err(|_| bad())? / 100.0,
        None => trimmed.parse::<f64>().map_err(|_| bad())?,
    };
    if !(value.is_finite() && value > 0.0 && value <= MAX_THRESHOLD) {
        return Err(bad());
    }
    Ok(value)
}

/// `PATTERN=THRESHOLD` (the pattern a workload-name pattern, `*` and `?` wildcards).
pub fn parse_override(text: &str) -> Result<(IdPattern, f64)> {
    let (pattern, value) = text.rsplit_once('=').ok_or_else(|| {
        Error::param(
            "threshold-for",
            "PATTERN=THRESHOLD, e.g. 'xl_relative/*=40%'",
            format!("{text:?}"),
        )
    })?;
    Ok((pattern.parse()?, parse_threshold(value)?))
}

/// One timed workload of a baseline.
#[derive(Debug, Clone, PartialEq)]
pub struct BaselineEntry {
    /// Reference or kernel.
    pub target: TargetKind,
    /// The workload's name.
    pub name: String,
    /// Where its figure came from.
    pub measured: Measured,
    /// Its floor ratio.
    pub floor_ratio: f64,
    /// The floor ratio's relative noise.
    pub floor_noise: f64,
}

/// A baseline: the timed workloads of an earlier run's JSON document.
#[derive(Debug, Clone, PartialEq)]
pub struct Baseline {
    /// The file it was read from.
    pub path: PathBuf,
    /// Its timed workloads.
    pub entries: Vec<BaselineEntry>,
    /// The machine's headroom during it (`calibration.headroom`), when recorded.
    pub headroom: Option<f64>,
}

impl Baseline {
    /// Reads a baseline file; errors name the file and the field.
    pub fn read(path: &Path) -> Result<Baseline> {
        let bytes = crate::files::read_regular(path, MAX_BASELINE_BYTES, "a baseline file")?;
        Baseline::parse(&bytes, path)
    }

    /// Parses a baseline document; `path` names it in errors.
    pub fn parse(bytes: &[u8], path: &Path) -> Result<Baseline> {
        let at = |field: &str| format!("{}: field `{field}`", path.display());
        let doc: Value = serde_json::from_slice(bytes).map_err(|e| {
            Error::format(
                path.display(),
                format!(
                    "not a bench JSON document (malformed JSON at line {}, column {}: {e})",
                    e.line(),
                    e.column()
                ),
            )
        })?;
        match doc.get("format") {
            Some(Value::String(f)) if f == render::FORMAT => {}
            other => {
                return Err(Error::format(
                    at("format"),
                    format!(
                        "expected \"{}\" (a document written by `posconform bench --format json`), found {}",
                        render::FORMAT,
                        shown(other)
                    ),
                ))
            }
        }
        match doc.get("version") {
            Some(Value::Number(n)) if n.as_u64() == Some(u64::from(render::VERSION)) => {}
            other => {
                return Err(Error::format(
                    at("version"),
                    format!(
                        "this build reads version {} of the bench document, found {} (the floor ratios of other versions are measured differently: record the baseline again with this build)",
                        render::VERSION,
                        shown(other)
                    ),
                ))
            }
        }
        let text_field = |value: Option<&Value>, field: &str| -> Result<String> {
            value
                .and_then(Value::as_str)
                .map(str::to_string)
                .ok_or_else(|| Error::format(at(field), "missing or not a string"))
        };
        let calibration = text_field(
            doc.get("calibration").and_then(|c| c.get("name")),
            "calibration.name",
        )?;
        if calibration != CALIBRATION {
            return Err(Error::format(
                at("calibration.name"),
                format!(
                    "the baseline was calibrated with {calibration:?}, this build with {CALIBRATION:?}; ratios of different calibrations do not compare (make a new baseline)"
                ),
            ));
        }
        let build = text_field(doc.get("build"), "build")?;
        if build != build_kind() {
            return Err(Error::format(
                at("build"),
                format!(
                    "the baseline comes from a {build} build, this run from a {} build; their ratios do not compare (build both with --release)",
                    build_kind()
                ),
            ));
        }
        let target = |value: Option<&Value>, field: &str| -> Result<TargetKind> {
            serde_json::from_value(value.cloned().unwrap_or(Value::Null))
                .map_err(|_| Error::format(at(field), "missing or not \"reference\" or \"kernel\""))
        };
        let default_target = target(doc.get("target"), "target")?;
        let workloads = doc
            .get("workloads")
            .and_then(Value::as_array)
            .ok_or_else(|| Error::format(at("workloads"), "missing or not a list"))?;
        let mut entries = Vec::new();
        for (i, w) in workloads.iter().enumerate() {
            let field = |f: &str| format!("workloads[{i}].{f}");
            if !w.is_object() {
                return Err(Error::format(
                    at(&format!("workloads[{i}]")),
                    "not an object",
                ));
            }
            let status = text_field(w.get("status"), &field("status"))?;
            match status.as_str() {
                "timed" => {}
                "skipped" | "error" => continue,
                other => {
                    return Err(Error::format(
                        at(&field("status")),
                        format!("{other:?} is not one of \"timed\", \"skipped\", \"error\""),
                    ))
                }
            }
            let name = text_field(w.get("name"), &field("name"))?;
            let measured: Measured = serde_json::from_value(
                w.get("measured").cloned().unwrap_or(Value::Null),
            )
            .map_err(|_| {
                Error::format(
                    at(&field("measured")),
                    "missing or not one of \"in_process\", \"kernel\", \"round_trip\"",
                )
            })?;
            let number = |f: &str, positive: bool| -> Result<f64> {
                let value = w.get(f).and_then(Value::as_f64);
                match value {
                    Some(x) if x.is_finite() && (x > 0.0 || (!positive && x >= 0.0)) => Ok(x),
                    _ => Err(Error::format(
                        at(&field(f)),
                        if positive {
                            "missing or not a number more than 0"
                        } else {
                            "missing or not a number of at least 0"
                        },
                    )),
                }
            };
            entries.push(BaselineEntry {
                target: match w.get("target") {
                    Some(value) => target(Some(value), &field("target"))?,
                    None => default_target,
                },
                name,
                measured,
                floor_ratio: number("floor_ratio", true)?,
                floor_noise: number("floor_noise", false)?,
            });
        }
        let headroom = match doc.get("calibration").and_then(|c| c.get("headroom")) {
            None | Some(Value::Null) => None,
            Some(v) => match v.as_f64() {
                Some(x) if x.is_finite() && x > 0.0 => Some(x),
                _ => {
                    return Err(Error::format(
                        at("calibration.headroom"),
                        "not a number more than 0 or null",
                    ))
                }
            },
        };
        Ok(Baseline {
            path: path.to_path_buf(),
            entries,
            headroom,
        })
    }
}

/// A JSON value as shown in an error, shortened.
fn shown(value: Option<&Value>) -> String {
    match value {
        None => "nothing".to_string(),
        Some(v) => {
            let mut text = v.to_string();
            if text.len() > 60 {
                text.truncate(60);
                text.push_str("...");
            }
            text
        }
    }
}

/// What the gate says about one workload.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Slower beyond the threshold, and the noise supports it.
    Regressed,
    /// The range reaches beyond the threshold without lying wholly beyond it.
    TooNoisy,
    /// Faster beyond the threshold, and the noise supports it.
    Improved,
    /// Within the threshold.
    Unchanged,
    /// Timed now, not in the baseline.
    New,
    /// Timed in the baseline, not now.
    Missing,
    /// Measured differently in the two runs.
    NotComparable,
}

impl Verdict {
    /// The verdict as the text report writes it.
    pub fn label(&self) -> &'static str {
        match self {
            Verdict::Regressed => "REGRESSED",
            Verdict::TooNoisy => "too noisy to judge",
            Verdict::Improved => "improved",
            Verdict::Unchanged => "unchanged",
            Verdict::New => "new",
            Verdict::Missing => "missing",
            Verdict::NotComparable => "not comparable",
        }
    }
}

/// A change and its range, as fractions (`1.0` is twice as slow).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Range {
    /// `now/baseline - 1`.
    pub change: f64,
    /// The lower end of its range.
    pub low: f64,
    /// The upper end (infinite when the baseline's noise reaches 50%).
    pub high: f64,
}

/// The verdict on a figure `ratio ± noise` now against `base ± base_noise` (relative
/// noise) with `threshold` (see the module docs), with the change and its range.
pub fn judge(
    base: f64,
    base_noise: f64,
    ratio: f64,
    noise: f64,
    threshold: f64,
) -> (Verdict, Range) {
    let change = ratio / base - 1.0;
    let low = ratio * (1.0 - noise).max(0.0) / (base * (1.0 + base_noise)) - 1.0;
    let high = if base_noise < 1.0 {
        ratio * (1.0 + noise) / (base * (1.0 - base_noise)) - 1.0
    } else {
        f64::INFINITY
    };
    let faster = 1.0 / (1.0 + threshold) - 1.0;
    let verdict = if low > threshold {
        Verdict::Regressed
    } else if high > threshold {
        Verdict::TooNoisy
    } else if high < faster {
        Verdict::Improved
    } else {
        Verdict::Unchanged
    };
    (verdict, Range { change, low, high })
}

/// One row of the gate.
#[derive(Debug, Clone, PartialEq)]
pub struct Change {
    /// Reference or kernel.
    pub target: TargetKind,
    /// The workload.
    pub name: String,
    /// Floor ratio and its noise in the baseline.
    pub baseline: Option<(f64, f64)>,
    /// Floor ratio and its noise now.
    pub now: Option<(f64, f64)>,
    /// The change and its range, when both runs timed the workload the same way.
    pub range: Option<Range>,
    /// The threshold that applied.
    pub threshold: f64,
    /// The verdict.
    pub verdict: Verdict,
    /// Why, for *not comparable*, *missing*, and *too noisy* when the machine's headroom
    /// differed from the baseline's.
    pub reason: Option<String>,
}

/// The gate's result.
#[derive(Debug, Clone, PartialEq)]
pub struct Gate {
    /// The baseline file.
    pub baseline: PathBuf,
    /// The default threshold.
    pub threshold: f64,
    /// One row per workload of either run, this run's order first.
    pub changes: Vec<Change>,
}

impl Gate {
    /// How many rows have `verdict`.
    pub fn count(&self, verdict: &Verdict) -> usize {
        self.changes
            .iter()
            .filter(|c| &c.verdict == verdict)
            .count()
    }

    /// Whether any workload regressed.
    pub fn failed(&self) -> bool {
        self.count(&Verdict::Regressed) > 0
    }
}

/// Compares `report` with `baseline`.
pub fn compare(report: &BenchReport, baseline: &Baseline, thresholds: &Thresholds) -> Gate {
    let mut changes = Vec::new();
    let mut matched = vec![false; baseline.entries.len()];
    let headroom = baseline.headroom.zip(report.headroom());
    for result in &report.workloads {
        let name = &result.workload.name;
        let threshold = thresholds.for_name(name);
        let found = baseline
            .entries
            .iter()
            .position(|e| e.target == report.target && &e.name == name);
        if let Some(i) = found {
            matched[i] = true;
        }
        let base = found.map(|i| &baseline.entries[i]);
        let row = |verdict, now, range, reason| Change {
            target: report.target,
            name: name.clone(),
            baseline: base.map(|b| (b.floor_ratio, b.floor_noise)),
            now,
            range,
            threshold,
            verdict,
            reason,
        };
        let timing = match &result.outcome {
            Outcome::Timed(t) => t,
            Outcome::Skipped(why) | Outcome::Error(why) => {
                if base.is_some() {
                    changes.push(row(
                        Verdict::Missing,
                        None,
                        None,
                        Some(format!("not timed in this run: {why}")),
                    ));
                }
                continue;
            }
        };
        let now = (timing.floor_ratio(), timing.floor_noise());
        let Some(base) = base else {
            changes.push(row(Verdict::New, Some(now), None, None));
            continue;
        };
        if base.measured != timing.measured {
            changes.push(row(
                Verdict::NotComparable,
                Some(now),
                None,
                Some(format!(
                    "measured as {} in the baseline, as {} now",
                    base.measured.name(),
                    timing.measured.name()
                )),
            ));
            continue;
        }
        let (verdict, range) = judge(base.floor_ratio, base.floor_noise, now.0, now.1, threshold);
        let faster = 1.0 / (1.0 + threshold) - 1.0;
        let (verdict, reason) = match (&verdict, headroom) {
            (Verdict::Regressed, Some((b, n)))
                if n < b && (1.0 + range.low) * n / b - 1.0 <= threshold =>
            {
                (
                    Verdict::TooNoisy,
                    Some(format!(
                        "slower beyond the threshold, but the machine had less headroom than during the baseline ({n:.2} against {b:.2}), which could make it up to {:.2}x as slow",
                        b / n
                    )),
                )
            }
            (Verdict::Improved, Some((b, n)))
                if n > b && (1.0 + range.high) * n / b - 1.0 >= faster =>
            {
                (
                    Verdict::TooNoisy,
                    Some(format!(
                        "faster beyond the threshold, but the machine had more headroom than during the baseline ({n:.2} against {b:.2}), which could make it up to {:.2}x as fast",
                        n / b
                    )),
                )
            }
            _ => (verdict, None),
        };
        changes.push(row(verdict, Some(now), Some(range), reason));
    }
    for (entry, _) in baseline
        .entries
        .iter()
        .zip(&matched)
        .filter(|(e, seen)| !**seen && e.target == report.target)
    {
        changes.push(Change {
            target: entry.target,
            name: entry.name.clone(),
            baseline: Some((entry.floor_ratio, entry.floor_noise)),
            now: None,
            range: None,
            threshold: thresholds.for_name(&entry.name),
            verdict: Verdict::Missing,
            reason: Some("not among this run's workloads".into()),
        });
    }
    Gate {
        baseline: baseline.path.clone(),
        threshold: thresholds.default,
        changes,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn thresholds_parse_as_fractions_or_percentages() {
        assert_eq!(parse_threshold("0.25").unwrap(), 0.25);
        assert_eq!(parse_threshold("40%").unwrap(), 0.4);
        for bad in ["0", "-1", "nan", "inf", "11", "abc", "%", ""] {
            assert!(parse_threshold(bad).is_err(), "{bad}");
        }
        let (pattern, t) = parse_override("xl_relative/*=50%").unwrap();
        assert!(pattern.matches("xl_relative/scores/L1_M0_d2_h1/f64"));
        assert_eq!(t, 0.5);
        assert!(parse_override("no-equals").is_err());
        assert!(parse_override("=0.5").is_err());
        let thresholds = Thresholds {
            default: 0.25,
            overrides: vec![(pattern, 0.5)],
        };
        assert_eq!(thresholds.for_name("xl_relative/encode/x/f64"), 0.5);
        assert_eq!(thresholds.for_name("rotary/encode/x/f64"), 0.25);
    }

    /// Hand-computed ranges: with noise `u = v = 0.1` the range of a ratio `r` over
    /// `b` is `r·0.9/(b·1.1) - 1` to `r·1.1/(b·0.9) - 1`.
    #[test]
    fn verdicts_follow_the_range_against_the_threshold() {
        // Twice as slow: range 2·0.9/1.1 - 1 = 0.63636.. to 2·1.1/0.9 - 1 = 1.44444..
        let (v, r) = judge(1.0, 0.1, 2.0, 0.1, 0.25);
        assert_eq!(v, Verdict::Regressed);
        assert!((r.change - 1.0).abs() < 1e-12);
        assert!((r.low - (1.8 / 1.1 - 1.0)).abs() < 1e-12);
        assert!((r.high - (2.2 / 0.9 - 1.0)).abs() < 1e-12);
        // The same figure: range 0.9/1.1 - 1 = -0.18 to 1.1/0.9 - 1 = 0.2222 <= 0.25.
        assert_eq!(judge(1.0, 0.1, 1.0, 0.1, 0.25).0, Verdict::Unchanged);
        // 30% slower but the range (1.3·0.9/1.1 - 1 = 0.0636) starts below 25%.
        assert_eq!(judge(1.0, 0.1, 1.3, 0.1, 0.25).0, Verdict::TooNoisy);
        // Very noisy: ±40% each, the range reaches far above the threshold.
        assert_eq!(judge(1.0, 0.4, 1.0, 0.4, 0.25).0, Verdict::TooNoisy);
        // Half the time: high = 0.5·1.1/0.9 - 1 = -0.389 < 1/1.25 - 1 = -0.2.
        assert_eq!(judge(1.0, 0.1, 0.5, 0.1, 0.25).0, Verdict::Improved);
        // Noise of 100% or more in the baseline: no upper end.
        let (v, r) = judge(1.0, 1.0, 1.0, 0.0, 0.25);
        assert_eq!((v, r.high), (Verdict::TooNoisy, f64::INFINITY));
        // Exact figures: nothing but the threshold decides.
        assert_eq!(judge(1.0, 0.0, 1.24, 0.0, 0.25).0, Verdict::Unchanged);
        assert_eq!(judge(1.0, 0.0, 1.26, 0.0, 0.25).0, Verdict::Regressed);
    }

    /// A report of one timed workload with floor ratio `floor` (block floors all
    /// equal: no noise) on a machine of headroom `alone / together`.
    fn report_with(floor: f64, alone: f64, together: f64) -> BenchReport {
        use super::super::{calibrate::Probe, stats::Summary, Timing, WorkloadResult};
        let shape: super::super::BenchShape = "L4_M2_d4_h1".parse().unwrap();
        let case = super::super::workload_cases(
            crate::scheme::Scheme::Alibi,
            crate::case::OperationKind::Scores,
            shape,
            crate::math::precision::Dtype::F64,
        )
        .unwrap()
        .remove(0);
        let one = Summary::of(&[1.0]).unwrap();
        let probe = Probe {
            alone_ms: alone,
            together_ms: together,
        };
        BenchReport {
            target: TargetKind::Reference,
            subject: "test".into(),
            options: Default::default(),
            calibration: Vec::new(),
            probes: vec![probe; 3],
            dry_run: None,
            workloads: vec![WorkloadResult {
                workload: super::super::Workload {
                    name: "w".into(),
                    shape,
                    case,
                },
                outcome: Outcome::Timed(Box::new(Timing {
                    measured: Measured::InProcess,
                    time: one,
                    unit: one,
                    product: one,
                    sweep: one,
                    block_floors: vec![floor; 5],
                    round_trip: None,
                    kernel: None,
                    overhead: None,
                })),
            }],
            notes: Vec::new(),
        }
    }

    fn baseline_of(report: &BenchReport) -> Baseline {
        let json = render::json(report, None);
        Baseline::parse(json.as_bytes(), Path::new("base.json")).unwrap()
    }

    /// 1.8 times as slow (no noise, threshold 25%) with as much headroom as the
    /// baseline: regressed. With headroom 0.4 against 0.6 (a core held by another
    /// process), which could make it up to 1.5x as slow: 1.8/1.5 = 1.2, within the
    /// threshold, so too noisy, saying why. With 0.5 against 0.6: 1.8/1.2 = 1.5, still
    /// regressed. 0.7 times the time with headroom 0.6 against 0.4: 0.7·1.5 = 1.05,
    /// too noisy; with the baseline's headroom, improved.
    #[test]
    fn lost_headroom_is_taken_out_of_a_regression() {
        let thresholds = Thresholds::default();
        let base = baseline_of(&report_with(1.0, 0.6, 1.0));
        assert_eq!(base.headroom, Some(0.6));
        let slow_alike = compare(&report_with(1.8, 0.6, 1.0), &base, &thresholds);
        assert_eq!(slow_alike.changes[0].verdict, Verdict::Regressed);
        assert!(slow_alike.failed());
        let slow_busy = compare(&report_with(1.8, 0.4, 1.0), &base, &thresholds);
        assert_eq!(slow_busy.changes[0].verdict, Verdict::TooNoisy);
        let why = slow_busy.changes[0].reason.as_deref().unwrap();
        assert!(
            why.contains("less headroom than during the baseline (0.40 against 0.60")
                && why.contains("up to 1.50x as slow"),
            "{why}"
        );
        assert!(!slow_busy.failed());
        let slow_a_little_busier = compare(&report_with(1.8, 0.5, 1.0), &base, &thresholds);
        assert_eq!(slow_a_little_busier.changes[0].verdict, Verdict::Regressed);
        let busy_base = baseline_of(&report_with(1.0, 0.4, 1.0));
        let fast_free = compare(&report_with(0.7, 0.6, 1.0), &busy_base, &thresholds);
        assert_eq!(fast_free.changes[0].verdict, Verdict::TooNoisy);
        let fast_alike = compare(&report_with(0.7, 0.4, 1.0), &busy_base, &thresholds);
        assert_eq!(fast_alike.changes[0].verdict, Verdict::Improved);
    }
}
