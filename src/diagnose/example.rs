//! A worked example of a fault: the smallest case it shows on, with the reference's
//! values and the faulty variant's side by side where they differ.

use super::Fault;
use crate::budget::budgets;
use crate::case::{Case, Output};
use crate::reference::{expected, variant_outputs, Outputs};

/// One element of an example: where, the reference's value, the variant's.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct ExampleElement {
    /// Its index in the output.
    pub index: Vec<usize>,
    /// The reference's value.
    pub reference: f64,
    /// The faulty variant's value.
    pub faulty: f64,
}

/// A fault on a small case.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Example {
    /// The case.
    pub case: Case,
    /// The output shown.
    pub output: Output,
    /// Its shape.
    pub shape: Vec<usize>,
    /// Elements where the variant is over budget against the reference, of all.
    pub differing: usize,
    /// Elements of the output.
    pub elements: usize,
    /// The first differing elements (at most `shown`).
    pub shown: Vec<ExampleElement>,
}

/// The elements over budget of each output, in output order.
type Differences = Vec<(Output, Vec<usize>)>;

/// Elements over budget per output, in output order.
fn differences(case: &Case, expected: &Outputs, variant: &Outputs) -> Option<Differences> {
    let inputs = case.inputs().ok()?;
    let budgets = budgets(case, &inputs, expected, case.dtype, 2.0).ok()?;
    let mut out = Vec::new();
    for (output, want) in expected {
        let v = variant.get(output)?;
        let budget = budgets.get(output)?;
        let allowance = budget.allowance();
        let differing: Vec<usize> = want
            .as_standard_layout()
            .iter()
            .zip(v.as_standard_layout().iter())
            .enumerate()
            .filter(|(n, (w, v))| {
                let same = (w.is_nan() && v.is_nan()) || w == v;
                // NaN against a number, or a difference beyond the tolerance.
                let within = (*w - *v).abs() <= budget.analytic_at(*n).max(allowance);
                !same && !within
            })
            .map(|(n, _)| n)
            .collect();
        out.push((*output, differing));
    }
    Some(out)
}

/// The first of `cases` (made as small as the fault still shows on) where `fault`
/// changes an output, with up to `shown` differing elements.
pub fn example(fault: &Fault, cases: &[Case], shown: usize) -> Option<Example> {
    let shows = |case: &Case| -> Option<(Outputs, Outputs, Differences)> {
        if !fault.variant.applies(case) {
            return None;
        }
        let inputs = case.inputs().ok()?;
        let want = expected(case, &inputs).ok()?;
        let got = variant_outputs(case, &inputs, case.dtype, fault.variant).ok()?;
        let diffs = differences(case, &want, &got)?;
        diffs
            .iter()
            .any(|(_, d)| !d.is_empty())
            .then_some((want, got, diffs))
    };
    let mut ordered: Vec<&Case> = cases.iter().collect();
    ordered.sort_by_key(|c| c.complexity());
    let mut best = ordered.into_iter().find(|c| shows(c).is_some())?.clone();
    // Greedy shrinking, as for a failing case.
    let mut improved = true;
    let mut tries = 0;
    while improved && tries < 200 {
        improved = false;
        for candidate in best.smaller() {
            tries += 1;
            if candidate.complexity() < best.complexity() && shows(&candidate).is_some() {
                best = candidate;
                improved = true;
                break;
            }
        }
    }
    let (want, got, diffs) = shows(&best)?;
    let (output, differing) = diffs.into_iter().find(|(_, d)| !d.is_empty())?;
    let (w, v) = (want.get(&output)?, got.get(&output)?);
    let shape = w.shape().to_vec();
    let (ws, vs) = (w.as_standard_layout(), v.as_standard_layout());
    let (ws, vs) = (ws.as_slice()?, vs.as_slice()?);
    let shown = differing
        .iter()
        .take(shown)
        .map(|&n| ExampleElement {
            index: index_of(n, &shape),
            reference: ws[n],
            faulty: vs[n],
        })
        .collect();
    Some(Example {
        case: best,
        output,
        elements: ws.len(),
        differing: differing.len(),
        shape,
        shown,
    })
}

fn index_of(mut n: usize, shape: &[usize]) -> Vec<usize> {
    let mut index = vec![0; shape.len()];
    for (axis, &size) in shape.iter().enumerate().rev() {
        index[axis] = n % size.max(1);
        n /= size.max(1);
    }
    index
}
