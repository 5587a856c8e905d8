//! The JSON, JUnit XML and SVG renderers, on reports produced by the real comparison of
//! built-in cases against deliberately corrupted outputs (and a few hand-built ones for
//! shapes the suite does not have).

use ndarray::Array3;
use posconform::case::{Arrays, Case, OperationKind, Output};
use posconform::compare::{
    compare, CaseReport, CompareOptions, Criterion, OutputReport, Verdict, Warning,
};
use posconform::math::Dtype;
use posconform::reference::{self, Outputs};
use posconform::report::{self, json, junit, svg, Report};
use posconform::tensor::Tensor;
use posconform::Scheme;
use serde_json::Value;

// ---------------------------------------------------------------------------------
// Building reports

fn core_case(id: &str) -> Case {
    posconform::suite::suite("core")
        .expect("the core suite builds")
        .into_iter()
        .find(|c| c.id == id)
        .unwrap_or_else(|| panic!("core suite has no case {id}"))
}

/// Compares `case` against its own expected outputs after `corrupt` has edited them.
fn compare_corrupted(case: &Case, corrupt: impl FnOnce(&mut Outputs)) -> CaseReport {
    let inputs = case.inputs().expect("inputs");
    let expected = reference::expected(case, &inputs).expect("expected outputs");
    let mut wrong = expected.clone();
    corrupt(&mut wrong);
    let got: Arrays = wrong
        .into_iter()
        .map(|(output, values)| {
            (
                output.name().to_string(),
                Tensor::from_f64(case.dtype, values),
            )
        })
        .collect();
    compare(case, &inputs, &expected, &got, &CompareOptions::default()).expect("comparison")
}

/// `xl_relative.scores.short_memory` (H = 2, L = 9, M = 4, K = 13): one NaN where a
/// finite score is expected and one leaking masked entry, both in head 1.
fn nan_and_leak() -> CaseReport {
    let case = core_case("xl_relative.scores.short_memory");
    compare_corrupted(&case, |outputs| {
        let scores = outputs.get_mut(&Output::Scores).unwrap();
        // Query 2 sees keys up to M + 2 = 6; key 12 is in its future.
        assert!(scores[[1, 2, 6]].is_finite());
        assert_eq!(scores[[1, 0, 12]], f64::NEG_INFINITY);
        scores[[1, 2, 6]] = f64::NAN;
        scores[[1, 0, 12]] = 0.0;
    })
}

/// `xl_relative.scores.scaled_clamped_d96` (M = 6) with every memory score of head 0
/// off by 1e-3: a wrong-memory-offset shape.
fn memory_offset() -> CaseReport {
    let case = core_case("xl_relative.scores.scaled_clamped_d96");
    let memory = case.memory_len;
    compare_corrupted(&case, |outputs| {
        let scores = outputs.get_mut(&Output::Scores).unwrap();
        for ((h, _, j), x) in scores
            .view_mut()
            .into_dimensionality::<ndarray::Ix3>()
            .unwrap()
            .indexed_iter_mut()
        {
            if h == 0 && j < memory && x.is_finite() {
                *x += 1e-3;
            }
        }
    })
}

fn passing() -> CaseReport {
    compare_corrupted(&core_case("alibi.scores.h12"), |_| {})
}

const NASTY: &str = "odd<&>\"'id";

/// Every verdict, with one of each kind of awkward text.
fn mixed_report() -> Report {
    let mut warned = passing();
    warned.case = "alibi.scores.warned".into();
    warned
        .warnings
        // A name the kernel chose: markup characters must survive every renderer.
        .push(Warning::IgnoredOutput {
            name: "<not f64> & more".into(),
        });
    let mut failing = memory_offset();
    failing.warnings.push(Warning::FitsNarrower {
        output: Output::Scores,
        declared: Dtype::F64,
        narrow: Dtype::F32,
    });
    let skipped_case = core_case("rotary.scores.scaled");
    let mut errored = CaseReport::error(
        &core_case("clipped.scores.k4"),
        "kernel exited: <&>\"' bell\u{7} and\u{1b}escape\nsecond line",
    );
    errored.case = NASTY.into();
    Report {
        mode: "check".into(),
        subject: "demo kernel <stdio>".into(),
        cases: vec![
            passing(),
            warned,
            failing,
            nan_and_leak(),
            errored,
            CaseReport::skipped(&skipped_case, "rotary scaling not supported"),
        ],
        notes: vec!["kernel restarted once".into()],
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    }
}

// ---------------------------------------------------------------------------------
// XML: well-formedness is roxmltree's verdict (a conforming XML 1.0 parser); the tree
// is copied into the small owned structure the assertions below navigate.

#[derive(Debug, Clone)]
struct Element {
    name: String,
    attributes: Vec<(String, String)>,
    children: Vec<Node>,
}

#[derive(Debug, Clone)]
enum Node {
    Element(Element),
    Text(String),
}

impl Element {
    fn attribute(&self, name: &str) -> Option<&str> {
        self.attributes
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }

    fn elements(&self) -> impl Iterator<Item = &Element> {
        self.children.iter().filter_map(|n| match n {
            Node::Element(e) => Some(e),
            Node::Text(_) => None,
        })
    }

    fn named<'a>(&'a self, name: &'a str) -> impl Iterator<Item = &'a Element> + 'a {
        self.elements().filter(move |e| e.name == name)
    }

    /// Every descendant element, depth first.
    fn descendants(&self) -> Vec<&Element> {
        let mut out = Vec::new();
        for child in self.elements() {
            out.push(child);
            out.extend(child.descendants());
        }
        out
    }

    fn text(&self) -> String {
        self.children
            .iter()
            .map(|n| match n {
                Node::Text(t) => t.clone(),
                Node::Element(e) => e.text(),
            })
            .collect()
    }

    fn number(&self, name: &str) -> f64 {
        self.attribute(name)
            .unwrap_or_else(|| panic!("<{}> has no {name}", self.name))
            .parse()
            .unwrap_or_else(|_| panic!("<{}> {name} is not a number", self.name))
    }
}

fn convert(node: roxmltree::Node<'_, '_>) -> Element {
    Element {
        name: node.tag_name().name().to_string(),
        attributes: node
            .attributes()
            .map(|a| (a.name().to_string(), a.value().to_string()))
            .collect(),
        children: node
            .children()
            .filter_map(|child| {
                if child.is_element() {
                    Some(Node::Element(convert(child)))
                } else {
                    child.text().map(|t| Node::Text(t.to_string()))
                }
            })
            .collect(),
    }
}

/// The root element of `xml`, or why it is not well-formed.
fn parse_xml(xml: &str) -> Result<Element, String> {
    let document = roxmltree::Document::parse(xml).map_err(|e| e.to_string())?;
    Ok(convert(document.root_element()))
}

/// The parser must reject what XML 1.0 rejects, or the tests below prove nothing.
#[test]
fn xml_checker_rejects_malformed_documents() {
    for bad in [
        "<a><b></a></b>",
        "<a x=\"1<2\"/>",
        "<a>1 & 2</a>",
        "<a>&bogus;</a>",
        "<a x=1/>",
        "<a>\u{1}</a>",
        "<a>&#1;</a>",
        "<a/><b/>",
        "<a>",
        "<a x=\"1\" x=\"2\"/>",
    ] {
        assert!(parse_xml(bad).is_err(), "accepted {bad:?}");
    }
    let good = parse_xml("<?xml version=\"1.0\"?>\n<a q='&apos;&#10;'>x &lt; y<b/></a>\n")
        .expect("well-formed");
    assert_eq!(good.attribute("q"), Some("'\n"));
    assert_eq!(good.text(), "x < y");
}

// ---------------------------------------------------------------------------------
// JSON

fn parse_json(report: &Report) -> Value {
    let text = json::render(report);
    assert!(text.ends_with("}\n"), "document must end in a newline");
    serde_json::from_str(&text).expect("the JSON report parses")
}

#[test]
fn json_has_header_counts_and_exit_code() {
    let report = mixed_report();
    let doc = parse_json(&report);
    assert_eq!(doc["format"], "posconform.report");
    assert_eq!(doc["version"], 2);
    assert_eq!(doc["mode"], "check");
    assert_eq!(doc["subject"], "demo kernel <stdio>");
    // One case could not be compared: the verdict is incomplete, whatever failed.
    assert_eq!(doc["exit_code"], 2);
    assert_eq!(doc["exit_code"], report.exit_code());
    assert_eq!(
        doc["counts"],
        serde_json::json!({"passed": 2, "failed": 2, "skipped": 1, "errors": 1})
    );
    assert_eq!(doc["notes"], serde_json::json!(["kernel restarted once"]));
    let cases = doc["cases"].as_array().unwrap();
    assert_eq!(cases.len(), 6);
    let kinds: Vec<&str> = cases
        .iter()
        .map(|c| c["verdict"]["kind"].as_str().unwrap())
        .collect();
    assert_eq!(kinds, ["pass", "pass", "fail", "fail", "error", "skipped"]);
    assert_eq!(cases[4]["id"], NASTY);
    assert_eq!(
        cases[5]["verdict"]["reason"],
        "rotary scaling not supported"
    );
    assert_eq!(cases[2]["scheme"], "xl_relative");
    assert_eq!(cases[2]["operation"], "scores");
    assert_eq!(cases[2]["memory_len"], 6);
}

#[test]
fn json_keys_come_in_the_documented_order() {
    let text = json::render(&mixed_report());
    let position = |key: &str| {
        text.find(&format!("\"{key}\":"))
            .unwrap_or_else(|| panic!("no key {key}"))
    };
    let order = [
        "format",
        "version",
        "mode",
        "subject",
        "exit_code",
        "counts",
        "notes",
        "never_exercised",
        "cases",
    ];
    for pair in order.windows(2) {
        assert!(position(pair[0]) < position(pair[1]), "{pair:?}");
    }
    assert!(text.starts_with("{\n  \"format\""), "pretty-printed");
}

#[test]
fn json_output_statistics_match_the_report() {
    let report = mixed_report();
    let doc = parse_json(&report);
    let failing = &report.cases[2].outputs[0];
    let output = &doc["cases"][2]["outputs"][0];
    assert_eq!(output["name"], "scores");
    assert_eq!(output["passed"], false);
    assert_eq!(output["over_budget"], failing.over_budget);
    assert_eq!(output["elements"], failing.elements);
    assert_eq!(output["max_abs"].as_f64().unwrap(), failing.max_abs);
    assert!((output["max_abs"].as_f64().unwrap() - 1e-3).abs() < 1e-9);
    assert_eq!(
        output["patterns"],
        serde_json::json!([{"kind": "memory_columns_only"}])
    );
    assert_eq!(
        output["worst"]["index"],
        serde_json::json!(failing.worst.clone().unwrap())
    );
    assert_eq!(output["dtype"], "f64");
    let decided = serde_json::to_value(failing.decided_by).unwrap();
    assert_eq!(output["decided_by"], decided);
    // The error map is for images, not for the document.
    assert!(output.get("error_map").is_none());
}

#[test]
fn json_writes_non_finite_numbers_as_strings() {
    let mut report = mixed_report();
    let doc = parse_json(&report);
    let leaking = &doc["cases"][3]["outputs"][0];
    // The comparison itself produced these: a NaN kernel value and a leaking mask.
    assert_eq!(leaking["worst"]["got"], "nan");
    assert_eq!(leaking["non_finite"], 1);
    assert_eq!(
        leaking["masking"],
        serde_json::json!({"kind": "leak", "count": 1})
    );

    let output = &mut report.cases[3].outputs[0];
    output.max_ulp = f64::INFINITY;
    output.worst_expected = f64::NEG_INFINITY;
    output.masking = Some(posconform::compare::Masking::Sentinel {
        value: f64::NEG_INFINITY,
    });
    let doc = parse_json(&report);
    let output = &doc["cases"][3]["outputs"][0];
    assert_eq!(output["max_ulp"], "inf");
    assert_eq!(output["worst"]["expected"], "-inf");
    assert_eq!(output["masking"]["value"], "-inf");
    assert!(
        output["allowance"].is_number(),
        "finite values stay numbers"
    );
    assert!(
        !json::render(&report).contains("null"),
        "no value of this report is absent, so none may be written as null"
    );
}

#[test]
fn json_exit_code_follows_the_verdicts() {
    let only_pass = Report {
        mode: "verify".into(),
        subject: "vectors/core".into(),
        cases: vec![passing()],
        notes: Vec::new(),
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    };
    assert_eq!(parse_json(&only_pass)["exit_code"], report::EXIT_CONFORMING);

    let mut with_error = only_pass.clone();
    with_error.cases.push(CaseReport::error(
        &core_case("clipped.scores.k4"),
        "missing results",
    ));
    assert_eq!(
        parse_json(&with_error)["exit_code"],
        report::EXIT_COULD_NOT_RUN
    );

    let nothing = Report {
        cases: Vec::new(),
        ..only_pass.clone()
    };
    let doc = parse_json(&nothing);
    assert_eq!(doc["exit_code"], report::EXIT_COULD_NOT_RUN);
    assert_eq!(doc["cases"], serde_json::json!([]));
}

// ---------------------------------------------------------------------------------
// JUnit XML

fn junit_root(report: &Report) -> Element {
    let xml = junit::render(report);
    assert!(xml.ends_with('\n'));
    parse_xml(&xml).unwrap_or_else(|e| panic!("JUnit XML is not well-formed: {e}\n{xml}"))
}

fn testcases(root: &Element) -> Vec<Element> {
    let suite = root.named("testsuite").next().expect("a testsuite");
    suite.named("testcase").cloned().collect()
}

#[test]
fn junit_suite_counts_and_names() {
    let root = junit_root(&mixed_report());
    assert_eq!(root.name, "testsuites");
    let suites: Vec<&Element> = root.named("testsuite").collect();
    assert_eq!(suites.len(), 1);
    let suite = suites[0];
    assert_eq!(suite.attribute("name"), Some("posconform check"));
    assert_eq!(suite.attribute("tests"), Some("6"));
    assert_eq!(suite.attribute("failures"), Some("2"));
    assert_eq!(suite.attribute("errors"), Some("1"));
    assert_eq!(suite.attribute("skipped"), Some("1"));
    let cases = testcases(&root);
    assert_eq!(cases.len(), 6);
    assert_eq!(cases[0].attribute("classname"), Some("alibi.scores"));
    assert_eq!(cases[0].attribute("name"), Some("alibi.scores.h12"));
    assert_eq!(
        cases[2].attribute("name"),
        Some("xl_relative.scores.scaled_clamped_d96")
    );
    let subject = suite
        .descendants()
        .into_iter()
        .find(|e| e.name == "property" && e.attribute("name") == Some("subject"))
        .expect("subject property");
    assert_eq!(subject.attribute("value"), Some("demo kernel <stdio>"));
    let notes = suite.named("system-out").next().expect("run notes");
    assert_eq!(notes.text(), "kernel restarted once");
}

#[test]
fn junit_children_follow_the_verdicts() {
    let cases = testcases(&junit_root(&mixed_report()));
    let children = |e: &Element| -> Vec<String> { e.elements().map(|c| c.name.clone()).collect() };
    assert!(
        children(&cases[0]).is_empty(),
        "a clean pass has no children"
    );
    assert_eq!(children(&cases[1]), ["system-out"]);
    assert_eq!(children(&cases[2]), ["failure"]);
    assert_eq!(children(&cases[3]), ["failure"]);
    assert_eq!(children(&cases[4]), ["error"]);
    assert_eq!(children(&cases[5]), ["skipped"]);
    assert_eq!(
        cases[5]
            .named("skipped")
            .next()
            .unwrap()
            .attribute("message"),
        Some("rotary scaling not supported")
    );
}

#[test]
fn junit_failure_says_where_and_how_much() {
    let report = mixed_report();
    let cases = testcases(&junit_root(&report));
    let failure = cases[2].named("failure").next().unwrap();
    let output = &report.cases[2].outputs[0];
    assert_eq!(
        failure.attribute("message").unwrap(),
        format!(
            "`scores`: {} of {} elements over budget",
            output.over_budget, output.elements
        )
    );
    let body = failure.text();
    assert!(body.contains("max abs error 0.001"), "{body}");
    assert!(body.contains("vs allowance"), "{body}");
    assert!(
        body.contains("only memory keys (key < M = 6) are wrong"),
        "{body}"
    );
    assert!(
        body.contains(
            "warning: output `scores`: the kernel claimed f64 but every value is representable in f32"
        ),
        "warnings of a failing case go into the failure body: {body}"
    );
    let leak = cases[3].named("failure").next().unwrap().text();
    assert!(leak.contains("got nan"), "{leak}");
    assert!(
        leak.contains("1 masked entry carries probability"),
        "{leak}"
    );
}

#[test]
fn junit_escapes_markup_and_drops_forbidden_characters() {
    let report = mixed_report();
    let xml = junit::render(&report);
    assert!(!xml.contains(NASTY), "the raw id must not appear unescaped");
    assert!(!xml.contains('\u{7}') && !xml.contains('\u{1b}'));
    let cases = testcases(&parse_xml(&xml).expect("well-formed"));
    assert_eq!(cases[4].attribute("name"), Some(NASTY));
    let error = cases[4].named("error").next().unwrap();
    assert_eq!(
        error.attribute("message"),
        Some("kernel exited: <&>\"' bell andescape\nsecond line")
    );
    assert!(
        xml.contains("andescape&#10;second line"),
        "a line feed in an attribute must be a reference, or readers turn it into a space"
    );
    let warned = cases[1].named("system-out").next().unwrap();
    assert_eq!(
        warned.text(),
        "warning: output `<not f64> & more` is not part of this case and was ignored\n",
        "warnings end in a line feed each"
    );
}

#[test]
fn junit_failure_names_every_failing_output_worst_first() {
    let case = compare_corrupted(&core_case("alibi.attention.h6"), |outputs| {
        // A NaN makes `output` the worst; `probs` is merely off.
        outputs.get_mut(&Output::Output).unwrap()[[0, 0, 0]] = f64::NAN;
        outputs.get_mut(&Output::Probs).unwrap()[[0, 3, 0]] += 1e-3;
    });
    assert_eq!(case.verdict, Verdict::Fail);
    let report = Report {
        mode: "verify".into(),
        subject: "vectors/core".into(),
        cases: vec![case],
        notes: Vec::new(),
        never_exercised: Vec::new(),
        random: Default::default(),
        diagnosis: None,
    };
    let cases = testcases(&junit_root(&report));
    let failure = cases[0].named("failure").next().unwrap();
    assert_eq!(
        failure.attribute("message").unwrap(),
        "`output`: 1 of 1536 elements over budget (and 1 more output)"
    );
    let body = failure.text();
    assert!(body.starts_with("output `output` [6, 4, 64]"), "{body}");
    assert!(body.contains("\nalso output `probs`: "), "{body}");
}

// ---------------------------------------------------------------------------------
// SVG

fn svg_root(svg: &str) -> Element {
    parse_xml(svg).unwrap_or_else(|e| panic!("SVG is not well-formed: {e}"))
}

fn panels(root: &Element) -> Vec<&Element> {
    root.descendants()
        .into_iter()
        .filter(|e| e.attribute("class") == Some("panel"))
        .collect()
}

/// `(x of the boundary line - x of the plot) / plot width`, per panel.
fn boundary_fractions(root: &Element) -> Vec<f64> {
    panels(root)
        .into_iter()
        .map(|panel| {
            let inside = panel.descendants();
            let plot = inside
                .iter()
                .find(|e| e.attribute("class") == Some("plot"))
                .expect("plot frame");
            let line = inside
                .iter()
                .find(|e| e.attribute("class") == Some("boundary"))
                .expect("boundary line");
            assert_eq!(line.number("x1"), line.number("x2"), "vertical");
            (line.number("x1") - plot.number("x")) / plot.number("width")
        })
        .collect()
}

/// The fill of the legend swatch whose label contains `label`.
fn legend_fill(root: &Element, label: &str) -> String {
    let legend = root
        .descendants()
        .into_iter()
        .find(|e| e.attribute("class") == Some("legend"))
        .expect("legend");
    let items: Vec<&Element> = legend.elements().collect();
    let at = items
        .iter()
        .position(|e| e.name == "text" && e.text().contains(label))
        .unwrap_or_else(|| panic!("no legend entry {label}"));
    assert_eq!(items[at - 1].name, "rect");
    items[at - 1].attribute("fill").unwrap().to_string()
}

fn cell_fills(root: &Element) -> Vec<String> {
    root.descendants()
        .into_iter()
        .filter(|e| e.name == "path" && e.attribute("d").is_some_and(|d| d.ends_with('z')))
        .filter_map(|e| e.attribute("fill").map(str::to_string))
        .collect()
}

#[test]
fn svg_of_a_real_failure_has_axes_boundary_and_panels() {
    let case = nan_and_leak();
    let output = &case.outputs[0];
    let image = svg::heatmap(&case, output).expect("scores have an error map");
    let root = svg_root(&image);
    assert_eq!(root.name, "svg");
    assert!(image.contains("query index"));
    assert!(image.contains("key index"));
    assert!(image.contains("memory | current"));
    assert!(image.contains("xl_relative.scores.short_memory · scores"));
    assert_eq!(panels(&root).len(), 2, "one panel per head");
    for fraction in boundary_fractions(&root) {
        assert!((fraction - 4.0 / 13.0).abs() < 1e-3, "{fraction}");
    }
    // Head 1 holds the NaN and the leak: drawn in the legend's colour for infinity.
    let infinite = legend_fill(&root, "∞");
    assert!(cell_fills(&root).contains(&infinite));
    assert!(
        !image.contains("downsampled"),
        "13 × 9 cells fit as they are"
    );
}

#[test]
fn svg_colours_only_over_budget_cells() {
    let case = memory_offset();
    let output = &case.outputs[0];
    let root = svg_root(&svg::heatmap(&case, output).unwrap());
    let fills = cell_fills(&root);
    assert!(!fills.is_empty(), "the memory errors are drawn");
    assert!(
        !fills.contains(&legend_fill(&root, "∞")),
        "nothing here is infinite"
    );
    assert!(
        !fills.contains(&legend_fill(&root, "within budget")),
        "within-budget cells are the background, not drawn one by one"
    );
    let fractions = boundary_fractions(&root);
    assert_eq!(fractions.len(), 2);
    assert!((fractions[0] - 6.0 / 12.0).abs() < 1e-3);
}

/// Failing `[H, L, K]` outputs carry an error map and get a heatmap; `[H, L, d]`
/// outputs and passing outputs carry none (no report draws a passing output).
#[test]
fn svg_is_none_without_an_error_map() {
    let case = nan_and_leak();
    let mut output = case.outputs[0].clone();
    output.error_map = None;
    assert!(svg::heatmap(&case, &output).is_none());
    let passing = compare_corrupted(&core_case("alibi.attention.h6"), |_| {});
    assert!(passing.outputs.iter().all(|o| o.error_map.is_none()));
    let attention = compare_corrupted(&core_case("alibi.attention.h6"), |outputs| {
        for output in outputs.values_mut() {
            output.mapv_inplace(|x| x * 1.01);
        }
    });
    let values = attention
        .outputs
        .iter()
        .find(|o| o.name == posconform::case::Output::Output)
        .unwrap();
    assert!(
        svg::heatmap(&attention, values).is_none(),
        "[H, L, d] has no map"
    );
    let probs = attention
        .outputs
        .iter()
        .find(|o| o.name == posconform::case::Output::Probs)
        .unwrap();
    assert!(svg::heatmap(&attention, probs).is_some());
}

/// A hand-built `[H, L, K]` report, for shapes the core suite does not have.
fn synthetic(
    heads: usize,
    queries: usize,
    memory: usize,
    map: Array3<f64>,
) -> (CaseReport, OutputReport) {
    let keys = map.shape()[2];
    let case = CaseReport {
        case: "synthetic.scores.large".into(),
        scheme: Some(Scheme::XlRelative),
        operation: Some(OperationKind::Scores),
        faults: Vec::new(),
        memory_len: memory,
        query_len: queries,
        verdict: Verdict::Fail,
        outputs: Vec::new(),
        warnings: Vec::new(),
        diagnosis: None,
        time: None,
    };
    let output = OutputReport {
        name: Output::Scores,
        shape: vec![heads, queries, keys],
        dtype: Dtype::F32,
        array_dtype: Dtype::F32,
        budget_dtype: Dtype::F32,
        passed: false,
        decided_by: Criterion::Baseline,
        max_abs: 1.0,
        max_rel: 1.0,
        max_ulp: 1.0,
        worst: Some(vec![0, 0, 0]),
        worst_error: 1.0,
        worst_ratio: 1e6,
        worst_got: 1.0,
        worst_expected: 0.0,
        worst_tolerance: 1e-6,
        over_budget: 1,
        elements: heads * queries * keys,
        non_finite: 0,
        allowance: 1e-6,
        masking: None,
        patterns: Vec::new(),
        error_map: Some(map.into_dyn()),
    };
    (case, output)
}

#[test]
fn svg_of_a_large_map_stays_small() {
    let (heads, queries, keys, memory) = (4, 512, 1024, 512);
    // Ratios from 1e-2 to 1e13 in a pattern with no long runs, plus leaks, so merging
    // equal neighbours cannot hide an unbounded cell count.
    let map = Array3::from_shape_fn((heads, queries, keys), |(h, i, j)| {
        let hash = (h * 7919 + i * 104_729 + j * 1_299_709) % 16;
        if hash == 15 {
            f64::INFINITY
        } else {
            10f64.powi(hash as i32 - 2)
        }
    });
    let (case, output) = synthetic(heads, queries, memory, map);
    let image = svg::heatmap(&case, &output).unwrap();
    assert!(image.len() < 200_000, "{} bytes", image.len());
    let root = svg_root(&image);
    assert_eq!(panels(&root).len(), 4);
    for fraction in boundary_fractions(&root) {
        assert!((fraction - 0.5).abs() < 1e-3, "{fraction}");
    }
    assert!(image.contains("downsampled"));
    assert!(image.contains("query index") && image.contains("key index"));
}

/// The worst case for size: as many cells as the image draws, neighbours in different
/// colour bins so no two merge.
#[test]
fn svg_of_a_map_at_the_cell_budget_stays_small() {
    let (heads, queries, keys, memory) = (4, 40, 50, 10);
    assert_eq!(
        heads * queries * keys,
        svg::CELL_BUDGET,
        "drawn without downsampling"
    );
    let map = Array3::from_shape_fn((heads, queries, keys), |(h, i, j)| {
        10f64.powi(((h + i + j) % 2) as i32 * 6 + 1)
    });
    let (case, output) = synthetic(heads, queries, memory, map);
    let image = svg::heatmap(&case, &output).unwrap();
    assert!(!image.contains("downsampled"));
    assert!(image.len() < 200_000, "{} bytes", image.len());
    let root = svg_root(&image);
    let cells: usize = root
        .descendants()
        .into_iter()
        .filter(|e| e.name == "path")
        .filter_map(|e| e.attribute("d"))
        .map(|d| d.matches('z').count())
        .sum();
    assert_eq!(
        cells,
        heads * queries * keys,
        "every cell drawn, none merged"
    );
}

#[test]
fn svg_caps_panels_and_keeps_the_worst_heads() {
    let (heads, queries, keys, memory) = (12, 4, 7, 3);
    // Head h has largest ratio 2^h, except head 5, which leaks.
    let map = Array3::from_shape_fn((heads, queries, keys), |(h, i, j)| {
        if (i, j) != (1, 2) {
            0.5
        } else if h == 5 {
            f64::INFINITY
        } else {
            2f64.powi(h as i32)
        }
    });
    let (case, output) = synthetic(heads, queries, memory, map);
    let image = svg::heatmap(&case, &output).unwrap();
    let root = svg_root(&image);
    let shown: Vec<usize> = panels(&root)
        .iter()
        .map(|p| p.attribute("data-head").unwrap().parse().unwrap())
        .collect();
    assert_eq!(shown, [4, 5, 6, 7, 8, 9, 10, 11]);
    assert!(image.contains("showing 8 of 12 heads"));
    for fraction in boundary_fractions(&root) {
        assert!((fraction - 3.0 / 7.0).abs() < 1e-3, "{fraction}");
    }
}

#[test]
fn svg_without_memory_draws_no_boundary() {
    let case = compare_corrupted(&core_case("xl_relative.scores.no_memory"), |outputs| {
        outputs.get_mut(&Output::Scores).unwrap()[[0, 3, 1]] += 1.0;
    });
    assert_eq!(case.memory_len, 0);
    let image = svg::heatmap(&case, &case.outputs[0]).unwrap();
    let root = svg_root(&image);
    assert_eq!(panels(&root).len(), 2);
    assert!(!image.contains("class=\"boundary\""));
    assert!(image.contains("M = 0 memory"));
}
