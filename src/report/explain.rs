//! The fault catalogue for people: `posconform explain` (the list, or one fault with a
//! worked example), and the generated docs page (docs/faults.md) with the self-test's
//! table.

use std::fmt::Write as _;

use crate::case::{Case, Operation};
use crate::diagnose::{catalogue, Example, Fault, FaultKind, Matching};
use crate::report::text::format_pair;
use crate::report::PlantedResult;

/// The first sentence of `text`.
fn first_sentence(text: &str) -> &str {
    match text.find(". ") {
        Some(end) => &text[..end + 1],
        None => text,
    }
}

/// `text` wrapped before `width` columns, each line starting with `indent`.
fn wrap(s: &mut String, indent: &str, text: &str, width: usize) {
    let mut line = String::new();
    for word in text.split_whitespace() {
        if !line.is_empty() && indent.len() + line.len() + 1 + word.len() > width {
            let _ = writeln!(s, "{indent}{line}");
            line.clear();
        }
        if !line.is_empty() {
            line.push(' ');
        }
        line.push_str(word);
    }
    if !line.is_empty() {
        let _ = writeln!(s, "{indent}{line}");
    }
}

fn kind_word(fault: &Fault) -> &'static str {
    match fault.kind {
        FaultKind::Bug => "mistake",
        FaultKind::Convention => "equivalent convention",
    }
}

/// The catalogue as a list: every id with the first sentence of its mistake.
pub fn catalogue_text() -> String {
    let mut s = String::new();
    let faults = catalogue();
    let _ = writeln!(
        s,
        "{} catalogued faults (posconform explain ID for one of them):\n",
        faults.len()
    );
    let width = faults.iter().map(|f| f.id.len()).max().unwrap_or(10);
    for f in faults {
        let marker = if f.kind == FaultKind::Convention {
            " [convention]"
        } else {
            ""
        };
        let mut line = String::new();
        wrap(&mut line, "", first_sentence(f.mistake), 90 - width);
        let mut lines = line.lines();
        let _ = writeln!(
            s,
            "  {:<width$}  {}{marker}",
            f.id,
            lines.next().unwrap_or("")
        );
        for more in lines {
            let _ = writeln!(s, "  {:<width$}  {more}", "");
        }
    }
    s
}

/// A case in one line: scheme, operation and the sizes that matter.
pub fn describe_case(case: &Case) -> String {
    let op = match &case.operation {
        Operation::Stream { tokens } => format!("stream of {tokens} tokens"),
        Operation::Decode {
            tokens,
            prefill,
            chunks,
        } => format!("decode of {tokens} tokens (prefill {prefill}, chunks {chunks:?})"),
        other => other.name().to_string(),
    };
    let mut extra = String::new();
    if !case.hidden_keys.is_empty() {
        extra += &format!(", hidden keys {:?}", case.hidden_keys);
    }
    if case.input_scale != 1.0 {
        extra += &format!(", inputs x{}", case.input_scale);
    }
    format!(
        "{} {op}, H = {}, L = {}, M = {}, d = {}, p0 = {}, {}{extra}; scheme {}",
        case.scheme.scheme().name(),
        case.heads,
        case.query_len,
        case.memory_len,
        case.head_dim,
        case.query_start,
        case.dtype,
        serde_json::to_string(&case.scheme).unwrap_or_default()
    )
}

/// One fault in full: the mistake, how it arises, which cases expose it, a worked
/// example, the fix, and the suite cases built to expose it.
pub fn explain_text(fault: &Fault, example: Option<&Example>, tagged: &[&str]) -> String {
    let mut s = String::new();
    let _ = writeln!(s, "{} ({})\n", fault.id, kind_word(fault));
    for (title, text) in [
        ("The mistake", fault.mistake),
        ("How it arises", fault.arises),
        ("Which cases expose it", fault.exposes),
    ] {
        let _ = writeln!(s, "{title}");
        wrap(&mut s, "  ", text, 92);
        let _ = writeln!(s);
    }
    let _ = writeln!(s, "Worked example (the reference against this mistake)");
    match example {
        Some(e) => {
            wrap(&mut s, "  ", &describe_case(&e.case), 92);
            let _ = writeln!(
                s,
                "  {} {:?}: {} of {} elements differ beyond the f64 budget{}",
                e.output,
                e.shape,
                e.differing,
                e.elements,
                if e.shown.len() < e.differing {
                    format!("; the first {}:", e.shown.len())
                } else {
                    ":".into()
                }
            );
            for el in &e.shown {
                let (faulty, reference) = format_pair(el.faulty, el.reference, e.case.dtype);
                let _ = writeln!(
                    s,
                    "    {:?}: reference {reference}, with the mistake {faulty}",
                    el.index
                );
            }
        }
        None => {
            let _ = writeln!(
                s,
                "  (no case of the core suite shows this mistake: it needs parameters the suite \
                 does not use)"
            );
        }
    }
    let _ = writeln!(s);
    let _ = writeln!(s, "The fix");
    wrap(&mut s, "  ", fault.fix, 92);
    if !tagged.is_empty() {
        let _ = writeln!(s);
        let _ = writeln!(s, "Core cases built to expose it");
        wrap(&mut s, "  ", &tagged.join(", "), 92);
    }
    if fault.matching == Matching::ErrorSize {
        let _ = writeln!(s);
        wrap(
            &mut s,
            "",
            "A kernel is said to have this mistake when its error has the size and spread of \
             the variant's (every kernel rounds differently, so element-by-element agreement \
             cannot be expected), and only while the variant's own error is small beside the \
             values.",
            92,
        );
    }
    s
}

/// Escapes `|` for a Markdown table cell.
fn cell(text: &str) -> String {
    text.replace('|', "\\|")
}

/// The generated docs page: how to read reports, the catalogue, and the self-test
/// table from `results` (with the command that produced it).
pub fn catalogue_markdown(
    results: &[PlantedResult],
    command: &str,
    examples: &[(&str, Option<Example>)],
) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        "# Fault catalogue\n\n\
<!-- Generated by `{command}`; do not edit by hand. A test regenerates this page and \
fails when it is stale. -->\n\n\
posconform names the likely bug behind a failing case by running every applicable fault \
below as a *faulty variant* of the reference on the same inputs, and comparing the \
kernel's outputs with each at the case's own budgets ([budgets.md](budgets.md)). A \
report then says which fault reproduces every element, which two do together, which \
comes closest, or that none does. Across a run, the fault that explains every failing \
case is checked against the cases that passed: a passing case the fault would have \
failed rules it out. `posconform explain ID` prints one fault with a worked example.\n\n\
Ids are words; a case's `faults` list (shown by `posconform list --suite core`) names \
the faults it is built to expose. Two entries are *equivalent conventions* rather than \
broken models (marked as such): they agree with the published scheme where attention \
is concerned and differ only in what a case pins down."
    );
    let _ = writeln!(s, "\n## How a fault is matched\n");
    let _ = writeln!(
        s,
        "- **Values**: every element of every output agrees with the variant within the \
case's tolerance, widened to the variant's magnitude (the reference's relative \
tolerance along the same row, up to 10%, taken over the values within a factor 100 \
of the row's largest, and the kernel dtype's rounding of a reduction); masked \
probabilities must be exactly 0 as in the comparison itself.\n\
- **Error size** (precision mistakes): every kernel rounds differently, so the error \
must instead have the variant's size (within a factor of 4 of its largest error), \
spread over as many elements (within a factor of 2), and grow where the variant's \
grows (correlation of the two error sizes at least 0.5), and only while the variant's \
own error is small beside the values (root-mean-square under a tenth of theirs): a \
variant that scrambles the outputs has the size of any mistake that moves values as \
far (swapped heads, a transposed output), so its size is no evidence. A kernel that \
computes in a narrower dtype is a correct kernel of that dtype, so its outputs must \
also be within the budgets of that dtype; angles formed in half precision are the \
same rounding of the same quantities in any kernel, so their errors must also agree \
in sign (correlation at least 0.5).\n\
- A variant that changes nothing on a case (within its budget) is not a candidate \
there; when no single fault explains a case, pairs of the closest partial matches are \
tried together."
    );
    let _ = writeln!(s, "\n## The catalogue\n");
    for f in catalogue() {
        let _ = writeln!(
            s,
            "### `{}`{}\n",
            f.id,
            if f.kind == FaultKind::Convention {
                " (equivalent convention)"
            } else {
                ""
            }
        );
        let _ = writeln!(s, "- **Mistake**: {}", f.mistake);
        let _ = writeln!(s, "- **How it arises**: {}", f.arises);
        let _ = writeln!(s, "- **Exposed by**: {}", f.exposes);
        let _ = writeln!(s, "- **Fix**: {}", f.fix);
        if let Some((_, Some(e))) = examples.iter().find(|(id, _)| *id == f.id) {
            let _ = writeln!(
                s,
                "- **Smallest core case it shows on**: {} ({} of {} `{}` elements differ)",
                describe_case(&e.case),
                e.differing,
                e.elements,
                e.output
            );
        }
        let _ = writeln!(s);
    }
    let _ = writeln!(
        s,
        "## Self-test: every fault planted in an otherwise correct kernel\n"
    );
    let _ = writeln!(
        s,
        "Each fault is planted in a kernel that is otherwise the same-precision reference \
(stages rounded to the case's dtype, angles in f32), then checked like any kernel: the \
core suite plus the fixed fuzz budget below. *Caught by* is the first suite case that \
failed (or the shrunk random case); *named* is the run's best candidate, and *conclusive* \
whether it alone (no tie) explains every diagnosed failure with no passing case against \
it. Produced \
by `{command}`.\n"
    );
    let _ = writeln!(s, "| fault | caught by | failing suite cases | failing random cases | named | top-1 | conclusive |");
    let _ = writeln!(s, "|---|---|---|---|---|---|---|");
    for r in results {
        let _ = writeln!(
            s,
            "| `{}` | {} | {} | {} | {} | {} | {} |",
            r.fault,
            r.detected_by
                .as_deref()
                .map_or("**not caught**".to_string(), cell),
            r.failing_suite_cases,
            r.failing_random_cases,
            r.named.map_or("-".to_string(), |n| format!("`{n}`")),
            if r.top1 { "yes" } else { "**no**" },
            if r.conclusive { "yes" } else { "no" }
        );
    }
    let detected = results.iter().filter(|r| r.detected_by.is_some()).count();
    let top1 = results.iter().filter(|r| r.top1).count();
    let conclusive = results.iter().filter(|r| r.conclusive).count();
    let _ = writeln!(
        s,
        "\n{} faults: {detected} caught ({:.0}%), {top1} named first ({:.0}%), {conclusive} \
conclusive.",
        results.len(),
        100.0 * detected as f64 / results.len().max(1) as f64,
        100.0 * top1 as f64 / results.len().max(1) as f64
    );
    let _ = writeln!(
        s,
        "\nThe planted kernels are the variants themselves, so this table measures the \
suite's power and the diagnosis's ability to tell the catalogued faults apart; it does \
not show that a variant matches how a real kernel makes the mistake. For that, \
tests/zoo_bugs runs kernels with one mistake each, written from the conventions alone \
without the catalogue's code, and scores how often the report names the mistake and \
whether it ever misleads."
    );
    s
}

/// The self-test table for a terminal.
pub fn planted_text(results: &[PlantedResult]) -> String {
    let mut s = String::new();
    let width = results
        .iter()
        .map(|r| r.fault.len())
        .max()
        .unwrap_or(5)
        .max(5);
    let caught_width = results
        .iter()
        .filter_map(|r| r.detected_by.as_ref().map(String::len))
        .max()
        .unwrap_or(9)
        .max(9);
    let _ = writeln!(
        s,
        "{:<width$}  {:<caught_width$}  {:>5} {:>6}  named",
        "fault", "caught by", "suite", "random"
    );
    for r in results {
        let named = match r.named {
            Some(n) if n == r.fault && r.conclusive => "yes (conclusive)".to_string(),
            Some(n) if n == r.fault => "yes".to_string(),
            Some(n) => format!("NO: {n}"),
            None => "NO: nothing named".to_string(),
        };
        let _ = writeln!(
            s,
            "{:<width$}  {:<caught_width$}  {:>5} {:>6}  {named}",
            r.fault,
            r.detected_by.as_deref().unwrap_or("NOT CAUGHT"),
            r.failing_suite_cases,
            r.failing_random_cases
        );
    }
    let detected = results.iter().filter(|r| r.detected_by.is_some()).count();
    let top1 = results.iter().filter(|r| r.top1).count();
    let n = results.len().max(1) as f64;
    let _ = writeln!(
        s,
        "\n{} faults: {detected} caught ({:.0}%), {top1} named first ({:.0}%)",
        results.len(),
        100.0 * detected as f64 / n,
        100.0 * top1 as f64 / n
    );
    s
}
