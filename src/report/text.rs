//! The report for people: a table of verdicts, the run's diagnosis (the catalogued
//! fault that explains the failures), then the findings (where, by how much, which
//! pattern, which fault reproduces them), warnings, notes and a closing summary.

use std::fmt::Write as _;

use crate::case::{OperationKind, Output};
use crate::compare::{CaseReport, Criterion, Masking, OutputReport, Pattern, Verdict};
use crate::diagnose::{self, FaultKind, Finding, Matching};
use crate::report::{printable, Report};

/// Each line of `text` made printable (kernel messages, stderr lines).
fn printable_lines(text: &str) -> impl Iterator<Item = String> + '_ {
    text.lines().map(printable)
}

/// Names of the axes of an output, for "head 0, query 3, key 7" style coordinates.
pub fn axis_names(case: &CaseReport, output: Output) -> &'static [&'static str] {
    match output {
        Output::Scores | Output::Probs => &["head", "query", "key"],
        Output::Output
            if matches!(
                case.operation,
                Some(OperationKind::Stream | OperationKind::Decode)
            ) =>
        {
            &["head", "token", "dim"]
        }
        Output::Output => &["head", "query", "dim"],
        Output::Rotated => &["head", "position", "dim"],
        Output::R => &["head", "distance", "dim"],
        Output::Table | Output::Rows => &["position", "dim"],
        Output::Slopes => &["head"],
        Output::Buckets | Output::Indices => &["index"],
    }
}

/// `head 0, query 3, key 7` for an index of `output`.
pub fn describe_index(case: &CaseReport, output: Output, index: &[usize]) -> String {
    let names = axis_names(case, output);
    index
        .iter()
        .enumerate()
        .map(|(axis, i)| format!("{} {i}", names.get(axis).copied().unwrap_or("axis")))
        .collect::<Vec<_>>()
        .join(", ")
}

fn verdict_word(v: &Verdict) -> &'static str {
    match v {
        Verdict::Pass => "pass",
        Verdict::Fail => "FAIL",
        Verdict::Skipped(_) => "skip",
        Verdict::Error(_) => "ERROR",
    }
}

/// The same criterion name the JSON and JUnit reports carry: for a pass, what accepted
/// it (`analytic`: every element within its analytic bound; `baseline`: some element
/// needed the same-precision allowance); for a failure, whose tolerance applied at the
/// worst element.
fn criterion_word(o: &OutputReport) -> &'static str {
    match o.decided_by {
        Criterion::Analytic => "analytic",
        Criterion::Baseline => "baseline",
        Criterion::Exact => "exact",
    }
}

/// The output with the largest error relative to its tolerance (failing ones first).
fn worst_output(case: &CaseReport) -> Option<&OutputReport> {
    let score = |o: &OutputReport| {
        (
            !o.passed,
            if o.worst_ratio.is_nan() {
                f64::INFINITY
            } else {
                o.worst_ratio
            },
        )
    };
    case.outputs.iter().max_by(|a, b| {
        score(a)
            .partial_cmp(&score(b))
            .unwrap_or(std::cmp::Ordering::Equal)
    })
}

/// Describes a pattern in words.
pub fn describe_pattern(case: &CaseReport, p: &Pattern) -> String {
    match p {
        Pattern::MaskedEntriesOnly => {
            "only masked entries are wrong: masked keys carry probability (the mask leaks)".into()
        }
        Pattern::MemoryColumnsOnly => format!(
            "only memory keys (key < M = {}) are wrong; current keys at the same distances are \
             right",
            case.memory_len
        ),
        Pattern::DistanceBand { from, to } if from == to => {
            format!("only distance Δ = {from} is wrong; other visible distances are right")
        }
        Pattern::DistanceBand { from, to } => format!(
            "only distances Δ = {from}..{to} are wrong; other visible distances are right"
        ),
        Pattern::GrowsWithPosition { ratio } => {
            format!("the error grows with position (last third {ratio:.1}x the first)")
        }
        Pattern::VisibleKeysMasked { count, top_left: true } => format!(
            "{count} visible {} masked, exactly keys i < j <= M + i in every row: the causal mask is aligned \
             top-left (j <= i) instead of offset by the memory (j <= M + i)",
            if *count == 1 { "key is" } else { "keys are" }
        ),
        Pattern::VisibleKeysMasked { count, top_left: false } => format!(
            "{count} {} that the query must see {} masked",
            if *count == 1 { "key" } else { "keys" },
            if *count == 1 { "is" } else { "are" }
        ),
        Pattern::BeginsAtRow { row } => {
            let what = match case.operation {
                Some(OperationKind::Stream | OperationKind::Decode) => "token",
                Some(OperationKind::Encode) => "row",
                _ => "query",
            };
            let segment = if case.operation == Some(OperationKind::Stream) && case.query_len > 0
            {
                format!(" (segment {})", row / case.query_len)
            } else {
                String::new()
            };
            format!("{what}s before {row} are right; errors begin at {what} {row}{segment}")
        }
        Pattern::FullyMaskedRows { rows, nan } => format!(
            "only {rows} {} whose keys are all masked {} wrong: {}",
            if *rows == 1 { "row" } else { "rows" },
            if *rows == 1 { "is" } else { "are" },
            if *nan {
                "NaN where zeros are expected"
            } else {
                "values where zeros are expected"
            }
        ),
        Pattern::RowConstantShift { largest } => format!(
            "the scores differ from the reference by one constant per query row (up to {largest:.3e}): \
             probabilities and outputs would agree, so this is an equivalent form of the bias (for \
             example ALiBi written as m·pos_key) and only the reported scores are off"
        ),
    }
}

fn describe_masking(m: &Masking) -> String {
    match m {
        Masking::NegativeInfinity => "masked entries are -inf (or exactly 0 probability)".into(),
        Masking::Sentinel { value } => format!(
            "masked entries hold a finite sentinel ({value:e}) that carries zero probability"
        ),
        Masking::Leak { count } => format!(
            "{count} masked {} probability (leak)",
            if *count == 1 {
                "entry carries"
            } else {
                "entries carry"
            }
        ),
        Masking::NonFinite { count } => format!(
            "{count} masked {} NaN or +inf where zero (or -inf) is expected",
            if *count == 1 {
                "entry holds"
            } else {
                "entries hold"
            }
        ),
    }
}

/// Renders the whole report.
pub fn render(report: &Report) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "posconform {}: {}",
        printable(&report.mode),
        printable(&report.subject)
    );
    let _ = writeln!(s);
    let width = report
        .cases
        .iter()
        .filter(|c| !report.random.contains(&c.case))
        .map(|c| c.case.len())
        .max()
        .unwrap_or(4)
        .clamp(4, 60);
    // Error, tolerance and their ratio are of one element: the one furthest over (or
    // closest to) its own tolerance, so the three columns cannot contradict each other.
    let _ = writeln!(
        s,
        "  {:<7} {:<width$}  {:<8} {:>10} {:>10} {:>9}  criterion",
        "verdict", "case", "output", "error", "tolerance", "err/tol"
    );
    // Skipped cases are summarised per reason, and random cases that passed or failed
    // per scheme and operation, so they do not bury the findings; random cases that
    // could not be compared are listed one by one like any other.
    let mut skipped: Vec<(&str, Vec<&str>)> = Vec::new();
    let mut random_passed: Vec<&str> = Vec::new();
    let mut random_failed: Vec<((&str, &str), Vec<&str>)> = Vec::new();
    for case in &report.cases {
        if let Verdict::Skipped(reason) = &case.verdict {
            match skipped.iter_mut().find(|(r, _)| r == reason) {
                Some((_, ids)) => ids.push(&case.case),
                None => skipped.push((reason, vec![&case.case])),
            }
            continue;
        }
        if report.random.contains(&case.case) {
            match case.verdict {
                Verdict::Pass => {
                    random_passed.push(&case.case);
                    continue;
                }
                Verdict::Fail => {
                    let key = (case.scheme_name(), case.operation_name());
                    match random_failed.iter_mut().find(|(k, _)| *k == key) {
                        Some((_, ids)) => ids.push(&case.case),
                        None => random_failed.push((key, vec![&case.case])),
                    }
                    continue;
                }
                _ => {}
            }
        }
        match (&case.verdict, worst_output(case)) {
            (Verdict::Pass | Verdict::Fail, Some(o)) => {
                let _ = writeln!(
                    s,
                    "  {:<7} {:<width$}  {:<8} {:>10.2e} {:>10.2e} {:>9}  {}",
                    verdict_word(&case.verdict),
                    printable(&case.case),
                    o.name.name(),
                    o.worst_error,
                    o.worst_tolerance,
                    format_ratio(o.worst_ratio),
                    criterion_word(o)
                );
            }
            (Verdict::Skipped(reason) | Verdict::Error(reason), _) => {
                let _ = writeln!(
                    s,
                    "  {:<7} {:<width$}  {}",
                    verdict_word(&case.verdict),
                    printable(&case.case),
                    printable(first_line(reason))
                );
            }
            (v, None) => {
                let _ = writeln!(
                    s,
                    "  {:<7} {:<width$}  (no outputs)",
                    verdict_word(v),
                    printable(&case.case)
                );
            }
        }
    }
    if !random_passed.is_empty() {
        let _ = writeln!(
            s,
            "  {:<7} {} random {} within budget ({})",
            "pass",
            random_passed.len(),
            if random_passed.len() == 1 {
                "case"
            } else {
                "cases"
            },
            few(&random_passed)
        );
    }
    for ((scheme, operation), ids) in &random_failed {
        let _ = writeln!(
            s,
            "  {:<7} {} random {} {} {} over budget ({}); the shrunk case is below",
            "FAIL",
            ids.len(),
            printable(scheme),
            printable(operation),
            if ids.len() == 1 { "case" } else { "cases" },
            few(ids)
        );
    }
    for (reason, ids) in &skipped {
        let noun = if ids.len() == 1 { "case" } else { "cases" };
        let _ = writeln!(
            s,
            "  {:<7} {} {noun}: {} ({})",
            "skip",
            ids.len(),
            printable(first_line(reason)),
            few(ids)
        );
    }
    let findings: Vec<&CaseReport> = report
        .cases
        .iter()
        .filter(|c| match c.verdict {
            Verdict::Pass | Verdict::Skipped(_) => false,
            // A random failure is told by its shrunk form.
            Verdict::Fail => !report.random.contains(&c.case),
            Verdict::Error(_) => true,
        })
        .collect();
    run_diagnosis(&mut s, report);
    if !findings.is_empty() {
        let _ = writeln!(s, "\nFindings");
        for case in findings {
            findings_of(&mut s, case);
        }
    }
    // The same warning on many cases is printed once, with the cases it concerns.
    let mut warnings: Vec<(String, Vec<&str>)> = Vec::new();
    for case in &report.cases {
        for w in &case.warnings {
            let text = w.to_string();
            match warnings.iter_mut().find(|(t, _)| *t == text) {
                Some((_, ids)) => ids.push(&case.case),
                None => warnings.push((text, vec![&case.case])),
            }
        }
    }
    if !warnings.is_empty() {
        let _ = writeln!(s, "\nWarnings (read before trusting a pass)");
        for (w, ids) in &warnings {
            let w = printable(w);
            if ids.len() == 1 {
                let _ = writeln!(s, "  {}: {w}", printable(ids[0]));
            } else {
                let _ = writeln!(s, "  {} cases ({}): {w}", ids.len(), few(ids));
            }
        }
    }
    if !report.notes.is_empty() {
        let _ = writeln!(s, "\nNotes");
        for n in &report.notes {
            for line in printable_lines(n) {
                let _ = writeln!(s, "  {line}");
            }
        }
    }
    if !report.never_exercised.is_empty() {
        let _ = writeln!(
            s,
            "\nNever exercised (no compared case covered these; a pass says nothing about them)"
        );
        for (declared, label) in [(false, "not declared"), (true, "declared, never run")] {
            let items: Vec<&str> = report
                .never_exercised
                .iter()
                .filter(|g| g.declared == declared)
                .map(|g| g.what.as_str())
                .collect();
            if !items.is_empty() {
                wrap_list(&mut s, &format!("  {label}: "), &items);
            }
        }
    }
    let c = report.counts();
    let outcome = match report.exit_code() {
        crate::report::EXIT_CONFORMING => "conforming",
        crate::report::EXIT_NONCONFORMING => "NONCONFORMING",
        _ => "could not run every case",
    };
    let _ = writeln!(
        s,
        "\n{} cases: {} within budget, {} over budget, {} skipped, {} could not run -> {outcome} (exit {})",
        report.cases.len(),
        c.passed,
        c.failed,
        c.skipped,
        c.errors,
        report.exit_code()
    );
    s
}

/// `items` joined with ", " after `lead`, wrapped before 92 columns with a hanging
/// indent.
fn wrap_list(s: &mut String, lead: &str, items: &[&str]) {
    let indent = " ".repeat(lead.len());
    let mut line = lead.to_string();
    for (n, item) in items.iter().enumerate() {
        let piece = if n + 1 < items.len() {
            format!("{item},")
        } else {
            (*item).to_string()
        };
        if line.len() > lead.len() && line.len() + 1 + piece.len() > 92 {
            let _ = writeln!(s, "{}", line.trim_end());
            line = indent.clone();
        } else if line.len() > lead.len() {
            line.push(' ');
        }
        line.push_str(&piece);
    }
    let _ = writeln!(s, "{line}");
}

/// Up to three ids, then how many more.
fn few(ids: &[&str]) -> String {
    let shown = ids
        .iter()
        .take(3)
        .map(|id| printable(id))
        .collect::<Vec<_>>()
        .join(", ");
    if ids.len() > 3 {
        format!("{shown} and {} more", ids.len() - 3)
    } else {
        shown
    }
}

fn first_line(text: &str) -> &str {
    text.lines().next().unwrap_or("")
}

fn format_ratio(ratio: f64) -> String {
    if ratio.is_infinite() || ratio.is_nan() {
        "inf".into()
    } else if ratio >= 1e4 {
        format!("{ratio:.1e}")
    } else {
        format!("{ratio:.2}")
    }
}

/// `got` and `expected` with as many significant digits as it takes to tell them apart:
/// at most what the dtype resolves (17 for f64, 9 for f32, 5 for f16, 4 for bf16) when
/// that suffices, up to 17 when it does not (an f32 kernel judged at the f64 budget can
/// fail by less than f32's digits show), so two different values never print alike.
pub fn format_pair(
    got: f64,
    expected: f64,
    dtype: crate::math::precision::Dtype,
) -> (String, String) {
    use crate::math::precision::Dtype;
    let most = match dtype {
        Dtype::F64 | Dtype::I64 => 17,
        Dtype::F32 => 9,
        Dtype::F16 => 5,
        Dtype::Bf16 => 4,
    };
    let show = |x: f64, digits: usize| {
        if x.is_finite() {
            format!("{:.*e}", digits - 1, x)
        } else {
            format!("{x}")
        }
    };
    let mut digits = 7.min(most);
    while digits < 17 && show(got, digits) == show(expected, digits) {
        digits += 1;
    }
    (show(got, digits), show(expected, digits))
}

fn format_ulp(ulp: f64) -> String {
    if ulp.is_infinite() {
        "inf".into()
    } else if ulp >= 1e6 {
        format!("{ulp:.1e}")
    } else {
        format!("{ulp:.1}")
    }
}

fn findings_of(s: &mut String, case: &CaseReport) {
    let _ = writeln!(
        s,
        "  {} {} [{} {}]",
        verdict_word(&case.verdict),
        printable(&case.case),
        case.scheme_name(),
        case.operation_name()
    );
    if let Verdict::Error(reason) = &case.verdict {
        for line in printable_lines(reason) {
            let _ = writeln!(s, "    {line}");
        }
    }
    for o in case.outputs.iter().filter(|o| !o.passed) {
        let share = if o.elements > 0 {
            100.0 * o.over_budget as f64 / o.elements as f64
        } else {
            0.0
        };
        let _ = writeln!(
            s,
            "    {} {:?} ({}): {} of {} elements over budget ({share:.1}%)",
            o.name, o.shape, o.dtype, o.over_budget, o.elements
        );
        if let Some(idx) = &o.worst {
            let (got, expected) = format_pair(o.worst_got, o.worst_expected, o.dtype);
            let _ = writeln!(
                s,
                "      worst at {}: got {got}, expected {expected}, error {:.2e}, tolerance {:.2e} ({}x)",
                describe_index(case, o.name, idx),
                o.worst_error,
                o.worst_tolerance,
                format_ratio(o.worst_ratio)
            );
        }
        let _ = writeln!(
            s,
            "      max abs {:.2e}, max rel {:.2e}, max ulp {} ({}); budget for {}, baseline allowance {:.2e}",
            o.max_abs,
            o.max_rel,
            format_ulp(o.max_ulp),
            o.dtype,
            o.budget_dtype,
            o.allowance
        );
        if o.non_finite > 0 {
            let _ = writeln!(
                s,
                "      {} non-finite values where finite ones were expected",
                o.non_finite
            );
        }
        for p in &o.patterns {
            let _ = writeln!(s, "      where: {}", describe_pattern(case, p));
        }
        if let Some(m) = &o.masking {
            let _ = writeln!(s, "      masking: {}", describe_masking(m));
        }
    }
    case_diagnosis(s, case, "    ");
}

/// `text` wrapped before 92 columns, every line after `lead` indented like `indent`.
fn wrapped(s: &mut String, lead: &str, indent: &str, text: &str) {
    let mut line = lead.to_string();
    let mut empty = lead.trim().is_empty();
    for word in text.split_whitespace() {
        if !empty && line.chars().count() + 1 + word.chars().count() > 92 {
            let _ = writeln!(s, "{line}");
            line = indent.to_string();
            empty = true;
        }
        if !empty {
            line.push(' ');
        }
        line.push_str(word);
        empty = false;
    }
    let _ = writeln!(s, "{line}");
}

fn quoted(ids: &[&str]) -> String {
    let ids: Vec<String> = ids.iter().map(|id| format!("`{id}`")).collect();
    match ids.len() {
        0 => String::new(),
        1 => ids[0].clone(),
        n => format!("{} and {}", ids[..n - 1].join(", "), ids[n - 1]),
    }
}

fn percent(x: f64) -> String {
    format!("{:.0}%", 100.0 * x)
}

/// The diagnosis of one failing case, or the faults it is built to expose when it
/// was not diagnosed.
fn case_diagnosis(s: &mut String, case: &CaseReport, indent: &str) {
    let more = format!("{indent}  ");
    let Some(d) = &case.diagnosis else {
        if case.verdict == Verdict::Fail && !case.faults.is_empty() {
            let ids: Vec<&str> = case.faults.iter().map(String::as_str).collect();
            wrapped(
                s,
                &format!("{indent}built to expose:"),
                &more,
                &format!("{} (posconform explain ID)", ids.join(", ")),
            );
        }
        return;
    };
    match &d.finding {
        Finding::Explained { faults } => {
            let first = faults.first().and_then(|id| diagnose::fault(id));
            if let (1, Some(f)) = (faults.len(), first) {
                let line = match (f.kind, f.matching) {
                    (FaultKind::Bug, Matching::ErrorSize) => format!(
                        "the errors are consistent with `{}`: they have the size and spread of \
                         its rounding, and the outputs are within the budgets of a correct kernel \
                         of that precision ({})",
                        f.id,
                        diagnose::explain_command(f.id)
                    ),
                    (FaultKind::Bug, Matching::Values) => format!(
                        "`{}` reproduces every output element within budget ({})",
                        f.id,
                        diagnose::explain_command(f.id)
                    ),
                    (FaultKind::Convention, _) => format!(
                        "matches `{}`, an equivalent convention rather than a broken model ({})",
                        f.id,
                        diagnose::explain_command(f.id)
                    ),
                };
                wrapped(s, &format!("{indent}diagnosis:"), &more, &line);
            } else {
                wrapped(
                    s,
                    &format!("{indent}diagnosis:"),
                    &more,
                    &format!(
                        "{} each match these outputs{}; this case cannot tell them apart (the \
                         run's diagnosis weighs every case). Details: posconform explain ID",
                        quoted(faults),
                        if faults.iter().any(|id| {
                            diagnose::fault(id).is_some_and(|f| f.matching == Matching::ErrorSize)
                        }) {
                            " (precision faults by the size of the error, the others element by \
                             element)"
                        } else {
                            " element by element within budget"
                        }
                    ),
                );
            }
        }
        Finding::Combined { faults } => wrapped(
            s,
            &format!("{indent}diagnosis:"),
            &more,
            &format!(
                "no single catalogued fault reproduces these outputs; {} together do. Details: \
                 posconform explain ID",
                quoted(faults)
            ),
        ),
        Finding::Partial { faults } => {
            let best = d.candidates.iter().find(|c| faults.contains(&c.fault));
            let detail = best.map_or(String::new(), |c| {
                format!(
                    " (`{}` reproduces {} of the over-budget elements and contradicts {} of the \
                     others)",
                    c.fault,
                    percent(c.reproduced),
                    percent(c.contradicted)
                )
            });
            wrapped(
                s,
                &format!("{indent}diagnosis:"),
                &more,
                &format!(
                    "no catalogued fault reproduces every element; closest: {}{detail}. Another \
                     mistake is present, alone or on top of it.",
                    quoted(faults)
                ),
            );
        }
        Finding::Unexplained => wrapped(
            s,
            &format!("{indent}diagnosis:"),
            &more,
            &format!(
                "no catalogued fault reproduces these outputs ({} applicable {} tried); the \
                 lines above say where the errors lie.",
                d.tried,
                if d.tried == 1 { "fault" } else { "faults" }
            ),
        ),
    }
}

/// The diagnosis lines of one case (empty when it has none), as in the text report.
pub fn describe_case_diagnosis(case: &CaseReport) -> String {
    let mut s = String::new();
    case_diagnosis(&mut s, case, "");
    s
}

/// The run's diagnosis section, as in the text report (empty when there is none).
pub fn describe_run_diagnosis(report: &Report) -> String {
    let mut s = String::new();
    run_diagnosis(&mut s, report);
    s.trim_start().to_string()
}

/// The run's diagnosis: the fault that explains the failures, checked against the
/// cases that passed.
fn run_diagnosis(s: &mut String, report: &Report) {
    let Some(d) = &report.diagnosis else {
        return;
    };
    let _ = writeln!(s, "\nDiagnosis");
    let cases = |n: usize| if n == 1 { "case" } else { "cases" };
    if let Some(best) = d.conclusive() {
        let Some(f) = diagnose::fault(best.fault) else {
            return;
        };
        let what = match f.kind {
            FaultKind::Bug => "likely bug",
            FaultKind::Convention => "equivalent convention (not a broken model)",
        };
        wrapped(
            s,
            &format!("  {what}: `{}`", f.id),
            "    ",
            &format!(
                "- it reproduces {} diagnosed failing {}, and no case that passed contradicts it.",
                if d.diagnosed == 1 {
                    "the".to_string()
                } else {
                    format!("all {}", d.diagnosed)
                },
                cases(d.diagnosed)
            ),
        );
        wrapped(s, "    mistake:", "      ", f.mistake);
        wrapped(s, "    fix:", "      ", f.fix);
        let _ = writeln!(s, "    details: {}", diagnose::explain_command(f.id));
        return;
    }
    let tied = d.tied();
    if !tied.is_empty() {
        wrapped(
            s,
            "  ",
            "  ",
            &format!(
                "{} catalogued faults each reproduce {} diagnosed failing {}, and no case \
                 that passed tells them apart; the bug is likely one of them:",
                tied.len(),
                if d.diagnosed == 1 {
                    "the".to_string()
                } else {
                    format!("all {}", d.diagnosed)
                },
                cases(d.diagnosed)
            ),
        );
        for id in tied {
            let Some(f) = diagnose::fault(id) else {
                continue;
            };
            wrapped(s, &format!("  - `{id}`:"), "      ", f.mistake);
            let _ = writeln!(s, "      details: {}", diagnose::explain_command(id));
        }
        return;
    }
    if d.ranked.is_empty() {
        wrapped(
            s,
            "  ",
            "  ",
            &format!(
                "No catalogued fault explains the {} diagnosed failing {}; see each case's \
                 diagnosis below.",
                d.diagnosed,
                cases(d.diagnosed)
            ),
        );
        return;
    }
    wrapped(
        s,
        "  ",
        "  ",
        &format!(
            "No single catalogued fault explains all {} diagnosed failing {} without \
             contradiction. Candidates:",
            d.diagnosed,
            cases(d.diagnosed)
        ),
    );
    for c in d.ranked.iter().take(4) {
        let mut line = format!(
            "explains {} of {} failing {}",
            c.explains.len(),
            d.diagnosed,
            cases(d.diagnosed)
        );
        if !c.contradicted_by.is_empty() {
            line += &format!(
                "; it would have failed {} {} that passed ({})",
                c.contradicted_by.len(),
                cases(c.contradicted_by.len()),
                few(&c
                    .contradicted_by
                    .iter()
                    .map(String::as_str)
                    .collect::<Vec<_>>())
            );
        }
        wrapped(s, &format!("  `{}`:", c.fault), "    ", &line);
    }
    let _ = writeln!(s, "    details: posconform explain ID");
}

/// The minimal failing cases found by fuzzing, with the parameters that matter.
pub fn render_minimal(minimal: &[crate::report::MinimalFailure]) -> String {
    let mut s = String::new();
    if minimal.is_empty() {
        return s;
    }
    let _ = writeln!(s, "\nMinimal failing cases (shrunk from random cases)");
    for m in minimal {
        let c = &m.case;
        let op = match &c.operation {
            crate::case::Operation::Stream { tokens } => format!("stream over {tokens} tokens"),
            crate::case::Operation::Decode {
                tokens,
                prefill,
                chunks,
            } => format!("decode of {tokens} tokens, prefill {prefill}, chunks {chunks:?}"),
            other => other.name().to_string(),
        };
        let _ = writeln!(
            s,
            "  {}: {} {op}, H = {}, L = {}, M = {}, d = {}, p0 = {}, {} (shrunk from {} in {} tries)",
            c.id,
            c.scheme.scheme().name(),
            c.heads,
            c.query_len,
            c.memory_len,
            c.head_dim,
            c.query_start,
            c.dtype,
            m.found,
            m.tried
        );
        let _ = writeln!(
            s,
            "    scheme parameters: {}",
            serde_json::to_string(&c.scheme).unwrap_or_default()
        );
        for o in m.report.outputs.iter().filter(|o| !o.passed) {
            if let Some(idx) = &o.worst {
                let (got, expected) = format_pair(o.worst_got, o.worst_expected, o.dtype);
                let _ = writeln!(
                    s,
                    "    {}: worst at {}: got {got}, expected {expected}, error {:.2e}, tolerance {:.2e}",
                    o.name,
                    describe_index(&m.report, o.name, idx),
                    o.worst_error,
                    o.worst_tolerance
                );
            }
            for p in &o.patterns {
                let _ = writeln!(s, "    where: {}", describe_pattern(&m.report, p));
            }
        }
        case_diagnosis(&mut s, &m.report, "    ");
        if let Some(path) = &m.saved {
            let _ = writeln!(
                s,
                "    saved: {} (replay: posconform check --kernel ... --case {0})",
                path.display()
            );
        }
    }
    s
}
