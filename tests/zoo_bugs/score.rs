//! Running a specimen through the checker and scoring what its report says.
//!
//! The report is read in its JSON form (`posconform::report::json`, what `check
//! --format json` prints), the way a CI user reads it:
//! - `diagnosis.conclusive`: the fault the run names as explaining every diagnosed
//!   failing case with no passing case against it ("likely bug" in the text report);
//! - `diagnosis.ranked`: otherwise the candidates, first the one explaining the most
//!   ("No single catalogued fault explains all … Candidates:");
//! - neither: "No catalogued fault explains …".
//!
//! Scores:
//! - **caught**: at least one case (suite or random) is over budget;
//! - **top**: the conclusive fault, else the first candidate, else "unexplained";
//! - **named**: for a catalogued mistake, the top fault is the expected one (stated as
//!   the full explanation or as the first candidate: the `full` flag says which); for an
//!   uncatalogued one, the run states no fault as the full explanation;
//! - **misleading**: the run states a fault other than the expected one as the full
//!   explanation (any fault, for an uncatalogued mistake); or a failing case's own
//!   diagnosis states that only precision faults (`angles-in-half-precision`,
//!   `computes-in-half-precision`, `computes-in-bfloat16`) other than the expected one
//!   reproduce it. None of these kernels computes in a precision other than the one it
//!   carries (f64, or its declared dtype, or f16 for the one computing in f16), so such a
//!   statement is one the mistake contradicts; precision faults are matched on the size
//!   of the error, not on values (docs/faults.md, "How a fault is matched"). A case
//!   whose diagnosis names another, non-precision fault matched that case's values
//!   within budget: true of that case (a small case often cannot tell two mistakes
//!   apart), so it is listed, not counted. Candidate lists and "no catalogued fault"
//!   wording never count as misleading.

use std::time::Instant;

use posconform::check::{check, CheckOptions};
use serde_json::Value;

use crate::specimens::{Expected, Specimen};

/// The faults matched on the size of the error rather than on values.
pub const PRECISION_FAULTS: [&str; 3] = [
    "angles-in-half-precision",
    "computes-in-half-precision",
    "computes-in-bfloat16",
];

/// Random cases after the core suite, per specimen.
pub const FUZZ_CASES: usize = 200;
/// Seed of the fuzzer (fixed, so the table is the same on every machine).
pub const FUZZ_SEED: u64 = 0xb06;
/// Kernel runs the shrinker may spend on one failure.
pub const SHRINK_BUDGET: usize = 40;

/// What the run's diagnosis says first.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Top {
    /// A fault stated as explaining every diagnosed failing case.
    Conclusive(String),
    /// No fault explains them all; the first candidate, with the failing cases it
    /// explains and how many were diagnosed.
    Candidate {
        /// Its id.
        fault: String,
        /// Diagnosed failing cases it explains.
        explains: usize,
        /// Diagnosed failing cases.
        of: usize,
    },
    /// No catalogued fault explains any diagnosed case.
    Unexplained,
    /// The report carries no diagnosis.
    Absent,
}

impl Top {
    /// The named fault, if any.
    pub fn fault(&self) -> Option<&str> {
        match self {
            Top::Conclusive(f) | Top::Candidate { fault: f, .. } => Some(f),
            _ => None,
        }
    }

    /// One line for the table.
    pub fn describe(&self) -> String {
        match self {
            Top::Conclusive(f) => format!("{f} (full)"),
            Top::Candidate {
                fault,
                explains,
                of,
            } => {
                format!("{fault} (closest, {explains}/{of})")
            }
            Top::Unexplained => "no catalogued fault".into(),
            Top::Absent => "no diagnosis".into(),
        }
    }
}

/// One specimen's score.
#[derive(Debug, Clone)]
pub struct Score {
    /// Specimen name.
    pub name: String,
    /// What the report should say.
    pub expected: Expected,
    /// The first case over budget (suite cases come first).
    pub caught_by: Option<String>,
    /// Cases over budget (suite, random, shrunk).
    pub failing: usize,
    /// Cases in error (the kernel could not answer).
    pub errors: usize,
    /// The run's first diagnosis.
    pub top: Top,
    /// Failing cases whose own diagnosis says only precision faults other than the
    /// expected one reproduce them (`case: faults`): misleading.
    pub misleading_cases: Vec<String>,
    /// Failing cases whose own diagnosis names faults without the expected one, a
    /// non-precision fault among them (`case: faults`): listed, not scored.
    pub cases_naming_another: Vec<String>,
    /// Seconds the check took.
    pub seconds: f64,
    /// The run's diagnosis as the text report words it.
    pub diagnosis_text: String,
    /// Each diagnosed failing case: id, finding kind, the faults it names, and the two
    /// closest candidates with the share of over-budget elements they reproduce.
    pub case_findings: Vec<String>,
}

impl Score {
    /// At least one case over budget.
    pub fn caught(&self) -> bool {
        self.caught_by.is_some()
    }

    /// The report names the expected answer (see the module docs).
    pub fn named(&self) -> bool {
        match self.expected {
            Expected::Fault(id) => self.top.fault() == Some(id),
            Expected::None => !matches!(self.top, Top::Conclusive(_)) && self.caught(),
        }
    }

    /// The expected fault is stated as the full explanation.
    pub fn named_fully(&self) -> bool {
        matches!((&self.top, self.expected), (Top::Conclusive(f), Expected::Fault(id)) if f == id)
    }

    /// The run states another fault as the full explanation.
    pub fn misleading_run(&self) -> bool {
        match (&self.top, self.expected) {
            (Top::Conclusive(f), Expected::Fault(id)) => f != id,
            (Top::Conclusive(_), Expected::None) => true,
            _ => false,
        }
    }

    /// The run, or a case, says something the mistake contradicts (module docs).
    pub fn misleading(&self) -> bool {
        self.misleading_run() || !self.misleading_cases.is_empty()
    }

    /// `run`, `case`, `run+case` or `no`, for the table.
    pub fn misleading_label(&self) -> &'static str {
        match (self.misleading_run(), !self.misleading_cases.is_empty()) {
            (true, true) => "run+case",
            (true, false) => "run",
            (false, true) => "case",
            (false, false) => "no",
        }
    }
}

/// Runs `specimen` on the core suite and [`FUZZ_CASES`] random cases and scores it
/// against `expected` (normally `specimen.expected`; the companion test passes others).
pub fn run(specimen: &Specimen, expected: Expected) -> (Score, Value) {
    run_with(specimen, expected, FUZZ_CASES)
}

/// [`run`] with `fuzz_cases` random cases.
pub fn run_with(specimen: &Specimen, expected: Expected, fuzz_cases: usize) -> (Score, Value) {
    let core = posconform::suite::suite("core").expect("core suite");
    let options = CheckOptions {
        fuzz_cases,
        seed: FUZZ_SEED,
        shrink_budget: SHRINK_BUDGET,
        save_dir: None,
        ..CheckOptions::default()
    };
    let mut kernel = specimen.kernel();
    let started = Instant::now();
    let outcome = check(&mut kernel, &core, &options, &mut |_, _, _| {})
        .unwrap_or_else(|e| panic!("{}: the check could not run: {e}", specimen.name));
    let seconds = started.elapsed().as_secs_f64();
    let json: Value = serde_json::from_str(&posconform::report::json::render(&outcome.report))
        .expect("the JSON report parses");
    let mut score = score(specimen.name, expected, &json, seconds);
    score.diagnosis_text = posconform::report::text::describe_run_diagnosis(&outcome.report);
    (score, json)
}

/// Scores a JSON report.
pub fn score(name: &str, expected: Expected, report: &Value, seconds: f64) -> Score {
    let cases = report["cases"].as_array().cloned().unwrap_or_default();
    let verdict = |c: &Value| c["verdict"]["kind"].as_str().unwrap_or("").to_string();
    let failing: Vec<&Value> = cases.iter().filter(|c| verdict(c) == "fail").collect();
    let errors = cases.iter().filter(|c| verdict(c) == "error").count();
    let caught_by = failing
        .first()
        .map(|c| c["id"].as_str().unwrap_or("?").to_string());
    let mut misleading_cases = Vec::new();
    let mut cases_naming_another = Vec::new();
    for c in &failing {
        let finding = &c["diagnosis"]["finding"];
        if finding["kind"] != "explained" {
            continue;
        }
        let faults: Vec<&str> = finding["faults"]
            .as_array()
            .into_iter()
            .flatten()
            .filter_map(Value::as_str)
            .collect();
        if faults.is_empty() || matches!(expected, Expected::Fault(id) if faults.contains(&id)) {
            continue;
        }
        let line = format!("{}: {}", c["id"].as_str().unwrap_or("?"), faults.join(", "));
        if faults.iter().all(|f| PRECISION_FAULTS.contains(f)) {
            misleading_cases.push(line);
        } else {
            cases_naming_another.push(line);
        }
    }
    let d = &report["diagnosis"];
    let top = if d.is_null() {
        Top::Absent
    } else if let Some(f) = d["conclusive"].as_str() {
        Top::Conclusive(f.to_string())
    } else if let Some(first) = d["ranked"].as_array().and_then(|r| r.first()) {
        Top::Candidate {
            fault: first["fault"].as_str().unwrap_or("?").to_string(),
            explains: first["explains"].as_array().map_or(0, Vec::len),
            of: d["diagnosed"].as_u64().unwrap_or(0) as usize,
        }
    } else {
        Top::Unexplained
    };
    Score {
        name: name.to_string(),
        expected,
        caught_by,
        failing: failing.len(),
        errors,
        top,
        misleading_cases,
        cases_naming_another,
        seconds,
        diagnosis_text: String::new(),
        case_findings: failing
            .iter()
            .filter(|c| !c["diagnosis"].is_null())
            .map(|c| {
                let d = &c["diagnosis"];
                let candidates: Vec<String> = d["candidates"]
                    .as_array()
                    .into_iter()
                    .flatten()
                    .take(2)
                    .map(|x| {
                        format!(
                            "{} {:.2}/{:.2}",
                            x["fault"].as_str().unwrap_or("?"),
                            x["reproduced"].as_f64().unwrap_or(f64::NAN),
                            x["contradicted"].as_f64().unwrap_or(f64::NAN)
                        )
                    })
                    .collect();
                format!(
                    "{}: {} {} [closest: {}]",
                    c["id"].as_str().unwrap_or("?"),
                    d["finding"]["kind"].as_str().unwrap_or("?"),
                    d["finding"]["faults"],
                    candidates.join(", ")
                )
            })
            .collect(),
    }
}

/// The table of scores.
pub fn table(scores: &[Score]) -> String {
    let mut s = format!(
        "{:<34} {:<38} {:<44} {:<52} {:<6} {:<10}\n",
        "kernel", "expected", "caught by", "top diagnosis", "named", "misleading"
    );
    for sc in scores {
        s += &format!(
            "{:<34} {:<38} {:<44} {:<52} {:<6} {:<10}\n",
            sc.name,
            sc.expected.label(),
            sc.caught_by.as_deref().unwrap_or("NOT CAUGHT"),
            sc.top.describe(),
            if sc.named() { "yes" } else { "no" },
            sc.misleading_label(),
        );
    }
    s
}
