//! Transformer-XL relative shift against the worked example.

use ndarray::{array, Array2};
use posconform::xl_relative::rel_shift;

/// A worked example (L=3, M=2, `BD[i][c] = 1000(i+1)+c`, worked by hand and in
/// vectors/mpmath/quoted_values.py) of the
/// relative-shift procedure of Dai et al. 2019, §3.3 and appendix B: prepend a zero
/// column, reshape to (K+1)×L, drop the first row, reshape to L×K.
#[test]
fn rel_shift_worked_example_l3_m2() {
    let bd = Array2::from_shape_fn((3, 5), |(i, c)| (1000 * (i + 1) + c) as f64);
    let want = array![
        [1002.0, 1003.0, 1004.0, 0.0, 2000.0],
        [2001.0, 2002.0, 2003.0, 2004.0, 0.0],
        [3000.0, 3001.0, 3002.0, 3003.0, 3004.0]
    ];
    assert_eq!(rel_shift(bd.view()), want);
}

/// The same procedure written literally (pad, reshape, drop, reshape) agrees with the
/// index remap for every shape with K >= L, including M = 0 and L = 1. The literal
/// form is written here, independently of the library.
#[test]
fn rel_shift_equals_literal_pad_reshape_procedure() {
    for l in 1..6 {
        for m in 0..6 {
            let k = l + m;
            let bd = Array2::from_shape_fn((l, k), |(i, c)| (100 * i + c) as f64 + 0.5);
            let mut padded = vec![0.0; l * (k + 1)];
            for i in 0..l {
                for c in 0..k {
                    padded[i * (k + 1) + c + 1] = bd[[i, c]];
                }
            }
            // Reshape to (K+1)×L and drop the first row == drop the first L entries.
            let literal = Array2::from_shape_vec((l, k), padded[l..].to_vec()).unwrap();
            assert_eq!(rel_shift(bd.view()), literal, "L={l} M={m}");
        }
    }
}
