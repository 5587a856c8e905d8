//! The formulas, separated from the budgets: every correct variant with its precisions
//! raised to f64 (same algorithms: frequency formulas, softmax forms, relative shifts,
//! ALiBi form, cache) agrees with the checker's expected values to 1e-9 of each
//! output's largest magnitude, on the core suite and on random cases of every scheme and
//! operation. At 1e-9 no rounding question arises (f64 angle errors at position 10^6 are
//! near 1e-10 of a unit value), so a disagreement here is a convention disagreement.

use ndarray::Dimension;
use posconform::case::Case;
use posconform::kernel::Answer;
use posconform::math::Dtype;
use posconform::reference;

use crate::harness::{random_cases, raw_run};
use crate::kernel::{Bug, Variant, ZooKernel};
use crate::variants;

const RELATIVE: f64 = 1e-9;

/// Disagreements of `variant` (run in f64) with the expected outputs on `cases`.
fn disagreements(variant: &Variant, cases: &[Case]) -> Vec<String> {
    let mut kernel = ZooKernel::new(variant.in_f64());
    let mut out = Vec::new();
    for case in cases {
        let inputs = case.inputs().expect("valid case");
        let expected = reference::expected(case, &inputs).expect("reference");
        let outputs = match raw_run(&mut kernel, case, Dtype::F64) {
            Answer::Outputs { outputs, .. } => outputs,
            Answer::Unsupported(_) => continue,
        };
        for (name, want) in &expected {
            let Some(got) = outputs.get(name.name()) else {
                out.push(format!("{}: missing output {name}", case.id));
                continue;
            };
            if got.shape() != want.shape() {
                out.push(format!(
                    "{}: {name} shape {:?} vs {:?}",
                    case.id,
                    got.shape(),
                    want.shape()
                ));
                continue;
            }
            let largest = want
                .iter()
                .filter(|x| x.is_finite())
                .fold(0.0f64, |m, x| m.max(x.abs()));
            let tolerance = if name.is_integer() {
                0.0
            } else {
                RELATIVE * largest
            };
            let mut bad = 0;
            let mut worst = (0.0, Vec::new(), 0.0, 0.0);
            for (idx, &w) in want.indexed_iter() {
                let g = got.view()[idx.slice()];
                let err = if w == f64::NEG_INFINITY || g == f64::NEG_INFINITY {
                    if w == g {
                        0.0
                    } else {
                        f64::INFINITY
                    }
                } else {
                    (g - w).abs()
                };
                if err.is_nan() || err > tolerance {
                    bad += 1;
                    if err.is_nan() || err > worst.0 {
                        worst = (err, idx.slice().to_vec(), g, w);
                    }
                }
            }
            if bad > 0 {
                out.push(format!(
                    "{} ({}): {name}: {bad} elements differ by more than {tolerance:.2e}; worst {:?}: got {:.17e}, expected {:.17e}",
                    case.id,
                    crate::harness::case_line(case),
                    worst.1,
                    worst.2,
                    worst.3
                ));
            }
        }
    }
    out
}

fn cases() -> Vec<Case> {
    let mut cases = posconform::suite::suite("core").expect("core suite");
    cases.extend(random_cases(
        0x2005,
        350,
        &[Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16],
    ));
    cases
}

#[test]
fn every_correct_variant_computes_the_conventions_in_f64() {
    let cases = cases();
    let mut all = Vec::new();
    for v in variants::correct() {
        let d = disagreements(&v, &cases);
        println!(
            "{}: {} disagreements on {} cases",
            v.name,
            d.len(),
            cases.len()
        );
        all.extend(d.into_iter().map(|line| format!("{}: {line}", v.name)));
    }
    assert!(
        all.is_empty(),
        "{} disagreements:\n{}",
        all.len(),
        all.join("\n")
    );
}

/// The companion: the same comparison sees each planted bug (in f64, on the core
/// suite; the two precision bugs still round to f16 there), so agreement above is not
/// vacuous.
#[test]
fn the_structural_check_sees_every_planted_bug() {
    let cases = posconform::suite::suite("core").expect("core suite");
    for bug in Bug::ALL {
        let v = variants::base(Dtype::F64).with_bug(bug);
        let d = disagreements(&v, &cases);
        assert!(
            !d.is_empty(),
            "{} agrees with the expected values on the core suite",
            v.name
        );
    }
}

/// The relative shift lands distance `M + i - j` at `(i, j)` for every visible pair,
/// and a zero at `j = M + i + 1`: checked on a matrix whose entries encode their own
/// row and distance, for every `L <= 6`, `M <= 6`. (Derivation: `(i, j)` of the result
/// is element `L + iK + j` of the padded `L×(K+1)` matrix read row-major, which is row
/// `i`, padded column `L - i + j`, i.e. column `L - 1 - i + j` of the input, which holds
/// distance `K - 1 - (L - 1 - i + j) = M + i - j`.)
#[test]
fn relative_shift_lands_every_distance() {
    for l in 1..=6usize {
        for m in 0..=6usize {
            let k = m + l;
            let bd: Vec<Vec<f64>> = (0..l)
                .map(|i| {
                    (0..k)
                        .map(|c| (1000 * (i + 1) + (k - 1 - c)) as f64)
                        .collect()
                })
                .collect();
            let y = crate::kernel::relative_shift(&bd);
            assert_eq!((y.len(), y[0].len()), (l, k));
            for (i, row) in y.iter().enumerate() {
                for (j, &x) in row.iter().enumerate().take(m + i + 1) {
                    assert_eq!(
                        x,
                        (1000 * (i + 1) + (m + i - j)) as f64,
                        "L={l} M={m} ({i},{j})"
                    );
                }
                if m + i + 1 < k {
                    assert_eq!(row[m + i + 1], 0.0, "L={l} M={m} ({i},{})", m + i + 1);
                }
            }
        }
    }
}

/// The worked example of the Transformer-XL shift at `L = 3, M = 2` with
/// `BD[i][c] = 1000(i+1) + c`, worked by hand from the definition (pad a zero column,
/// read row-major as 6×3, drop the first row, read as 3×5).
#[test]
fn relative_shift_worked_example() {
    let bd: Vec<Vec<f64>> = (0..3)
        .map(|i| (0..5).map(|c| (1000 * (i + 1) + c) as f64).collect())
        .collect();
    let want = [
        [1002.0, 1003.0, 1004.0, 0.0, 2000.0],
        [2001.0, 2002.0, 2003.0, 2004.0, 0.0],
        [3000.0, 3001.0, 3002.0, 3003.0, 3004.0],
    ];
    let y = crate::kernel::relative_shift(&bd);
    for (row, w) in y.iter().zip(want) {
        assert_eq!(row.as_slice(), w.as_slice());
    }
}
