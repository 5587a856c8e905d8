//! The CI report: JUnit XML, the test-result format most CI dashboards read.
//!
//! One `<testsuite>` named `posconform <mode>` inside a `<testsuites>` root, with one
//! `<testcase>` per case (`classname` is `scheme.operation`, `name` the case id):
//!
//! - a failing case holds `<failure message="..." type="over_budget">` whose text gives
//!   the worst output (its worst element, the largest absolute error against the
//!   tolerance, the masking seen and the error patterns), one line per other failing
//!   output, the diagnosis (which catalogued fault reproduces the outputs) and the
//!   case's warnings; the message names the fault when one alone reproduces them;
//! - a case that could not be compared holds `<error message="..." type="not_compared">`;
//! - a case the kernel does not support holds `<skipped message="..."/>`, so a missing
//!   feature shows as skipped rather than failed;
//! - warnings of a case without a failure body go to its `<system-out>`; the run's
//!   diagnosis and notes go to the suite's `<system-out>`, and a conclusive diagnosis
//!   is also the suite property `diagnosis`.
//!
//! A case a live kernel answered (`check`) carries `time`, in seconds: the kernel's
//! own `elapsed_ms` when it reports one (docs/protocol.md), else the round trip the
//! harness measured. The suite's `time` is the sum of its cases' times. Cases with no
//! time (`verify`, errors, skipped cases) and reports without any carry no `time`
//! attribute: a made-up duration would mislead a dashboard.
//!
//! Text is escaped by `escape` and `escape_text`, which also drop the control
//! characters XML 1.0 cannot carry at all.
//!
//! Written by hand rather than through an XML library: the document is a fixed,
//! shallow shape and the one subtle part, escaping, is a dozen lines tested directly.

use std::fmt::Write as _;

use super::Report;
use crate::compare::{CaseReport, Criterion, Masking, OutputReport, Verdict};

/// Renders `report` as a JUnit XML document ending in a newline.
pub fn render(report: &Report) -> String {
    let counts = report.counts();
    let total = report.cases.len();
    let suite_name = format!("posconform {}", report.mode);
    let mut xml = String::from("<?xml version=\"1.0\" encoding=\"UTF-8\"?>\n");
    let mut totals = format!(
        "tests=\"{total}\" failures=\"{}\" errors=\"{}\" skipped=\"{}\"",
        counts.failed, counts.errors, counts.skipped
    );
    let times: Vec<f64> = report
        .cases
        .iter()
        .filter_map(|c| c.time.map(|t| t.seconds()))
        .collect();
    if !times.is_empty() {
        let _ = write!(totals, " time=\"{}\"", seconds(times.iter().sum()));
    }
    // `write!` into a String cannot fail, hence the ignored results throughout.
    let _ = writeln!(
        xml,
        "<testsuites name=\"{}\" {totals}>",
        escape(&suite_name)
    );
    let _ = writeln!(
        xml,
        "  <testsuite name=\"{}\" {totals}>",
        escape(&suite_name)
    );
    let _ = writeln!(xml, "    <properties>");
    let _ = writeln!(
        xml,
        "      <property name=\"subject\" value=\"{}\"/>",
        escape(&report.subject)
    );
    let _ = writeln!(
        xml,
        "      <property name=\"exit_code\" value=\"{}\"/>",
        report.exit_code()
    );
    if let Some(d) = &report.diagnosis {
        let named = match d.conclusive() {
            Some(best) => best.fault.to_string(),
            None => d.tied().join(" or "),
        };
        if !named.is_empty() {
            let _ = writeln!(
                xml,
                "      <property name=\"diagnosis\" value=\"{}\"/>",
                escape(&named)
            );
        }
    }
    let _ = writeln!(xml, "    </properties>");
    for case in &report.cases {
        write_case(&mut xml, case);
    }
    let mut out = crate::report::text::describe_run_diagnosis(report);
    if !report.notes.is_empty() {
        out.push_str(&report.notes.join("\n"));
    }
    if !out.is_empty() {
        let _ = writeln!(
            xml,
            "    <system-out>{}</system-out>",
            escape_text(out.trim_end())
        );
    }
    xml.push_str("  </testsuite>\n</testsuites>\n");
    xml
}

fn write_case(xml: &mut String, case: &CaseReport) {
    let _ = write!(
        xml,
        "    <testcase classname=\"{}\" name=\"{}\"",
        escape(&format!("{}.{}", case.scheme_name(), case.operation_name())),
        escape(&case.case)
    );
    if let Some(time) = case.time {
        let _ = write!(xml, " time=\"{}\"", seconds(time.seconds()));
    }
    let mut warnings_written = false;
    let child = match &case.verdict {
        Verdict::Pass => None,
        Verdict::Fail => {
            warnings_written = true;
            Some(format!(
                "      <failure message=\"{}\" type=\"over_budget\">{}</failure>\n",
                escape(&failure_message(case)),
                escape_text(&failure_body(case))
            ))
        }
        Verdict::Error(reason) => Some(format!(
            "      <error message=\"{}\" type=\"not_compared\"/>\n",
            escape(reason)
        )),
        Verdict::Skipped(reason) => {
            Some(format!("      <skipped message=\"{}\"/>\n", escape(reason)))
        }
    };
    let system_out = (!warnings_written && !case.warnings.is_empty()).then(|| {
        format!(
            "      <system-out>{}</system-out>\n",
            escape_text(&warning_lines(&case.warnings))
        )
    });
    if child.is_none() && system_out.is_none() {
        xml.push_str("/>\n");
        return;
    }
    xml.push_str(">\n");
    xml.push_str(child.as_deref().unwrap_or(""));
    xml.push_str(system_out.as_deref().unwrap_or(""));
    xml.push_str("    </testcase>\n");
}

/// Seconds as JUnit writes them: a plain decimal (no exponent), to the microsecond.
fn seconds(value: f64) -> String {
    format!("{:.6}", value.max(0.0))
}

/// Escapes `text` for an XML attribute value, and drops the characters XML 1.0
/// forbids even as references (C0 controls other than tab, line feed and carriage
/// return; U+FFFE and U+FFFF).
///
/// Tab, line feed and carriage return are written as character references because a
/// reader normalises them to spaces in attribute values.
pub(crate) fn escape(text: &str) -> String {
    escape_with(text, true)
}

/// Escapes `text` for XML character data, like [`escape`] but keeping tabs and line
/// feeds as they are (readers keep them in content); carriage returns are still
/// references, since end-of-line handling would drop them.
fn escape_text(text: &str) -> String {
    escape_with(text, false)
}

fn escape_with(text: &str, attribute: bool) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&apos;"),
            '\t' | '\n' if !attribute => out.push(c),
            '\t' => out.push_str("&#9;"),
            '\n' => out.push_str("&#10;"),
            '\r' => out.push_str("&#13;"),
            c if (c as u32) < 0x20 || c == '\u{FFFE}' || c == '\u{FFFF}' => {}
            c => out.push(c),
        }
    }
    out
}

/// The failing outputs, worst first: by error relative to tolerance at the worst
/// element (non-finite values count as infinitely bad), then by elements over budget.
fn failing_outputs(case: &CaseReport) -> Vec<&OutputReport> {
    let mut failing: Vec<&OutputReport> = case.outputs.iter().filter(|o| !o.passed).collect();
    failing.sort_by(|a, b| {
        worst_ratio(b)
            .total_cmp(&worst_ratio(a))
            .then(b.over_budget.cmp(&a.over_budget))
    });
    failing
}

fn worst_ratio(output: &OutputReport) -> f64 {
    if output.non_finite > 0 || output.worst_ratio.is_nan() {
        f64::INFINITY
    } else {
        output.worst_ratio
    }
}

fn failure_message(case: &CaseReport) -> String {
    let failing = failing_outputs(case);
    match failing.first() {
        Some(worst) => {
            let others = match failing.len() {
                1 => String::new(),
                n => format!(" (and {} more output{})", n - 1, plural(n - 1)),
            };
            let named = match case.diagnosis.as_ref().map(|d| &d.finding) {
                Some(crate::diagnose::Finding::Explained { faults }) if faults.len() == 1 => {
                    format!("; reproduced by `{}`", faults[0])
                }
                _ => String::new(),
            };
            format!(
                "`{}`: {} of {} elements over budget{others}{named}",
                worst.name, worst.over_budget, worst.elements
            )
        }
        // A Fail verdict always has a failing output; say so plainly if one does not.
        None => "over budget".to_string(),
    }
}

fn failure_body(case: &CaseReport) -> String {
    let failing = failing_outputs(case);
    let mut body = String::new();
    if let Some(worst) = failing.first() {
        let _ = writeln!(
            body,
            "output `{}` {:?}, {} (budget for {}, criterion {})",
            worst.name,
            worst.shape,
            worst.dtype,
            worst.budget_dtype,
            criterion(worst.decided_by)
        );
        if let Some(index) = &worst.worst {
            let _ = writeln!(
                body,
                "worst element {index:?}: got {}, expected {}, error {}, tolerance {} ({}x)",
                exact(worst.worst_got),
                exact(worst.worst_expected),
                number(worst.worst_error),
                number(worst.worst_tolerance),
                number(worst.worst_ratio)
            );
        }
        let _ = writeln!(
            body,
            "max abs error {} vs allowance {} (finite values); max rel error {}; max {} ulp",
            number(worst.max_abs),
            number(worst.allowance),
            number(worst.max_rel),
            number(worst.max_ulp)
        );
        let _ = writeln!(
            body,
            "{} of {} elements over budget, {} non-finite",
            worst.over_budget, worst.elements, worst.non_finite
        );
        if let Some(masking) = worst.masking {
            let _ = writeln!(body, "masking: {}", describe_masking(masking));
        }
        if !worst.patterns.is_empty() {
            let patterns: Vec<String> = worst
                .patterns
                .iter()
                .map(|p| crate::report::text::describe_pattern(case, p))
                .collect();
            let _ = writeln!(body, "patterns: {}", patterns.join("; "));
        }
    }
    for other in failing.iter().skip(1) {
        let _ = writeln!(
            body,
            "also output `{}`: {} of {} elements over budget, max abs error {}",
            other.name,
            other.over_budget,
            other.elements,
            number(other.max_abs)
        );
    }
    body.push_str(&crate::report::text::describe_case_diagnosis(case));
    if !case.warnings.is_empty() {
        body.push_str(&warning_lines(&case.warnings));
    }
    body
}

fn warning_lines(warnings: &[crate::compare::Warning]) -> String {
    warnings.iter().map(|w| format!("warning: {w}\n")).collect()
}

fn describe_masking(masking: Masking) -> String {
    match masking {
        Masking::NegativeInfinity => "-inf (or exact zero probability)".to_string(),
        Masking::Sentinel { value } => format!("finite sentinel {}", number(value)),
        Masking::Leak { count: 1 } => "1 masked entry carries probability".to_string(),
        Masking::Leak { count } => format!("{count} masked entries carry probability"),
        Masking::NonFinite { count: 1 } => "1 masked entry holds NaN or +inf".to_string(),
        Masking::NonFinite { count } => format!("{count} masked entries hold NaN or +inf"),
    }
}

/// A real number to four significant figures (the JSON report has the exact values),
/// with the same spellings for non-finite values as the JSON report.
fn number(x: f64) -> String {
    if x.is_nan() {
        "nan".to_string()
    } else if x.is_infinite() {
        if x > 0.0 { "inf" } else { "-inf" }.to_string()
    } else if x == 0.0 {
        "0".to_string()
    } else if (1e-3..1e5).contains(&x.abs()) {
        let decimals = (3 - x.abs().log10().floor() as i32).max(0) as usize;
        let text = format!("{x:.decimals$}");
        if text.contains('.') {
            text.trim_end_matches('0').trim_end_matches('.').to_string()
        } else {
            text
        }
    } else {
        format!("{x:.3e}")
    }
}

/// A real number written so it reads back exactly: a kernel value and its expected
/// value may differ only in the last digits.
fn exact(x: f64) -> String {
    if x.is_finite() {
        format!("{x}")
    } else {
        number(x)
    }
}

fn criterion(criterion: Criterion) -> &'static str {
    match criterion {
        Criterion::Analytic => "analytic",
        Criterion::Baseline => "baseline",
        Criterion::Exact => "exact",
    }
}

fn plural(n: usize) -> &'static str {
    if n == 1 {
        ""
    } else {
        "s"
    }
}
