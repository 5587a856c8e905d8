//! The one matrix product behind every reference computation.
//!
//! Every element of `c = alpha · a · b + beta · c` is computed in one fixed order that
//! does not depend on the processor, the build or the number of threads:
//!
//! ```text
//! sum = 0;  for p in 0..k { sum = sum + a[i,p] · b[p,j] }   (each · and + rounded once)
//! c[i,j] = alpha · sum + (beta == 0 ? 0 : beta · c[i,j])
//! ```
//!
//! No fused multiply-add is used (Rust never contracts `x * y + z` on its own), so every
//! operation is an IEEE 754 binary64 operation rounded to nearest, and the result is
//! bit-identical on every machine. Speed comes from *where* the work happens, never from
//! reordering a sum: the operands are packed into contiguous panels, a register tile of
//! `MR × NR` outputs accumulates side by side (the SIMD lanes hold different outputs,
//! never parts of one sum), the tile code is compiled for AVX-512 and AVX2 as well as
//! for the baseline instruction set and chosen at run time, and large products split
//! their rows between threads. Which lanes, instruction set or thread computed an
//! element changes nothing in how it is computed, so golden vectors stay byte-identical
//! across machines (`.ci/vectors-two-builds` checks it against a build that forces the
//! baseline code).
//!
//! The order is also the plain loop's order: a product written as three nested loops
//! gives the same bits (the tests check this against such a loop).

use ndarray::{ArrayBase, ArrayViewMut2, Axis, Data, DataMut, Ix2};

/// Rows of a register tile.
const MR: usize = 4;
/// Columns of a register tile (two 4-lane or one 8-lane f64 vector per row).
const NR: usize = 8;
/// Below this many multiply-adds a product runs as plain loops: packing would cost
/// more than it saves.
const SMALL: usize = 4096;
/// From this many multiply-adds on, a product splits its rows between threads.
const PARALLEL: usize = 1 << 21;

/// Which compiled version of the tile code runs (decided once per process).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kernel {
    /// Baseline instructions (SSE2 on x86_64, NEON on aarch64, or none).
    Baseline,
    /// AVX2 (x86_64).
    Avx2,
    /// AVX-512F (x86_64).
    Avx512,
}

/// The tile code this process uses: the widest the processor has, unless the build
/// was made with `POSCONFORM_PRODUCT_KERNEL=baseline` in its environment (the second
/// build of `.ci/vectors-two-builds`).
pub fn kernel() -> Kernel {
    use std::sync::OnceLock;
    static CHOSEN: OnceLock<Kernel> = OnceLock::new();
    *CHOSEN.get_or_init(|| {
        if option_env!("POSCONFORM_PRODUCT_KERNEL") == Some("baseline") {
            return Kernel::Baseline;
        }
        detect()
    })
}

#[cfg(target_arch = "x86_64")]
fn detect() -> Kernel {
    if std::arch::is_x86_feature_detected!("avx512f") {
        Kernel::Avx512
    } else if std::arch::is_x86_feature_detected!("avx2") {
        Kernel::Avx2
    } else {
        Kernel::Baseline
    }
}

#[cfg(not(target_arch = "x86_64"))]
fn detect() -> Kernel {
    Kernel::Baseline
}

/// `c = alpha · a · b + beta · c` in the fixed order of the module docs.
///
/// Shapes: `a[m, k]`, `b[k, n]`, `c[m, n]`; any strides. Panics when the shapes do
/// not agree (a bug in the caller: every reference path checks shapes first).
pub fn gemm<A, B, C>(
    alpha: f64,
    a: &ArrayBase<A, Ix2>,
    b: &ArrayBase<B, Ix2>,
    beta: f64,
    c: &mut ArrayBase<C, Ix2>,
) where
    A: Data<Elem = f64>,
    B: Data<Elem = f64>,
    C: DataMut<Elem = f64>,
{
    let (m, k) = a.dim();
    let (k2, n) = b.dim();
    assert!(
        k == k2 && c.dim() == (m, n),
        "gemm: a {:?} · b {:?} into c {:?}",
        a.dim(),
        b.dim(),
        c.dim()
    );
    if m == 0 || n == 0 {
        return;
    }
    let work = m.saturating_mul(n).saturating_mul(k.max(1));
    if work < SMALL {
        plain(alpha, a, b, beta, c);
        return;
    }
    let b_packed = pack_columns(b);
    gemm_packed(alpha, a, &b_packed, 0, beta, c);
}

/// The columns of a right-hand operand `b[k, n]`, packed once for several products
/// ([`gemm_packed`]) that use all of them or a range of them.
#[derive(Debug, Clone)]
pub struct PackedColumns {
    k: usize,
    n: usize,
    data: Vec<f64>,
}

impl PackedColumns {
    /// Rows of `b` (the inner dimension of the products).
    pub fn inner(&self) -> usize {
        self.k
    }

    /// Columns of `b`.
    pub fn columns(&self) -> usize {
        self.n
    }
}

/// `b[k, n]` packed for [`gemm_packed`].
pub fn pack_columns<B: Data<Elem = f64>>(b: &ArrayBase<B, Ix2>) -> PackedColumns {
    let (k, n) = b.dim();
    PackedColumns {
        k,
        n,
        data: pack_b(b),
    }
}

/// `c = alpha · a · b[.., first..first + c.ncols()] + beta · c`, with `b` packed by
/// [`pack_columns`]: the same bits as [`gemm`] on that range of columns.
///
/// Panics when the shapes do not agree (a bug in the caller).
pub fn gemm_packed<A, C>(
    alpha: f64,
    a: &ArrayBase<A, Ix2>,
    b: &PackedColumns,
    first: usize,
    beta: f64,
    c: &mut ArrayBase<C, Ix2>,
) where
    A: Data<Elem = f64>,
    C: DataMut<Elem = f64>,
{
    let (m, k) = a.dim();
    let n = c.ncols();
    assert!(
        k == b.k && c.nrows() == m && first + n <= b.n,
        "gemm_packed: a {:?} · b columns {first}..{} of {:?} into c {:?}",
        a.dim(),
        first + n,
        (b.k, b.n),
        c.dim()
    );
    if m == 0 || n == 0 {
        return;
    }
    let work = m.saturating_mul(n).saturating_mul(k.max(1));
    let kernel = kernel();
    let rows_per_task = if work >= PARALLEL && rayon::current_num_threads() > 1 {
        // A few tasks per thread, whole tiles each, so threads finish together.
        let tasks = 4 * rayon::current_num_threads();
        m.div_ceil(tasks).next_multiple_of(MR).max(MR)
    } else {
        m
    };
    let a = a.view();
    let task = |(index, mut c_rows): (usize, ArrayViewMut2<'_, f64>)| {
        let row = index * rows_per_task;
        let rows = c_rows.nrows();
        let a_rows = a.slice(ndarray::s![row..row + rows, ..]);
        let a_packed = pack_a(&a_rows);
        tiles(
            kernel,
            alpha,
            &a_packed,
            &b.data,
            k,
            first,
            beta,
            &mut c_rows,
        );
    };
    if rows_per_task < m {
        use rayon::prelude::*;
        c.axis_chunks_iter_mut(Axis(0), rows_per_task)
            .into_par_iter()
            .enumerate()
            .for_each(task);
    } else {
        task((0, c.view_mut()));
    }
}

/// `a · b` allocated, through [`gemm`].
pub fn matmul<A, B>(a: &ArrayBase<A, Ix2>, b: &ArrayBase<B, Ix2>) -> ndarray::Array2<f64>
where
    A: Data<Elem = f64>,
    B: Data<Elem = f64>,
{
    let mut c = ndarray::Array2::zeros((a.nrows(), b.ncols()));
    gemm(1.0, a, b, 0.0, &mut c);
    c
}

/// The final step of every element: `alpha · sum + (beta == 0 ? 0 : beta · c)`.
#[inline(always)]
fn finish(alpha: f64, sum: f64, beta: f64, old: f64) -> f64 {
    alpha * sum + if beta == 0.0 { 0.0 } else { beta * old }
}

/// Small products: the order of the module docs as three loops.
fn plain<A, B, C>(
    alpha: f64,
    a: &ArrayBase<A, Ix2>,
    b: &ArrayBase<B, Ix2>,
    beta: f64,
    c: &mut ArrayBase<C, Ix2>,
) where
    A: Data<Elem = f64>,
    B: Data<Elem = f64>,
    C: DataMut<Elem = f64>,
{
    for ((i, j), out) in c.indexed_iter_mut() {
        let mut sum = 0.0;
        for (x, y) in a.row(i).iter().zip(b.column(j)) {
            sum += x * y;
        }
        *out = finish(alpha, sum, beta, *out);
    }
}

/// `a[m, k]` as row panels of `MR` rows, each stored `k × MR` (element `(p, i)` at
/// `p·MR + i`), the last panel padded with zero rows.
fn pack_a(a: &ndarray::ArrayView2<'_, f64>) -> Vec<f64> {
    let (m, k) = a.dim();
    let panels = m.div_ceil(MR);
    let mut out = vec![0.0; panels * k * MR];
    for (panel, chunk) in out.chunks_exact_mut(k * MR).enumerate() {
        for i in 0..MR.min(m - panel * MR) {
            scatter(a.row(panel * MR + i), chunk, i, MR);
        }
    }
    out
}

/// `chunk[p·stride + offset] = line[p]`, reading `line` as a slice when it is one.
#[inline]
fn scatter(line: ndarray::ArrayView1<'_, f64>, chunk: &mut [f64], offset: usize, stride: usize) {
    let targets = chunk[offset..].iter_mut().step_by(stride);
    match line.as_slice() {
        Some(values) => targets.zip(values).for_each(|(t, &x)| *t = x),
        None => targets.zip(line.iter()).for_each(|(t, &x)| *t = x),
    }
}

/// `b[k, n]` as column panels of `NR` columns, each stored `k × NR` (element `(p, j)`
/// at `p·NR + j`), the last panel padded with zero columns.
fn pack_b<B: Data<Elem = f64>>(b: &ArrayBase<B, Ix2>) -> Vec<f64> {
    let (k, n) = b.dim();
    let panels = n.div_ceil(NR);
    let mut out = vec![0.0; panels * k * NR];
    if k == 0 {
        return out;
    }
    let b = b.view();
    if b.strides()[1] == 1 {
        // Row-major rows: copy NR consecutive values of each row at a time.
        for (panel, chunk) in out.chunks_exact_mut(k * NR).enumerate() {
            let j0 = panel * NR;
            let width = NR.min(n - j0);
            for (p, target) in chunk.chunks_exact_mut(NR).enumerate() {
                let row = b.row(p);
                let part = row.slice(ndarray::s![j0..j0 + width]);
                match part.as_slice() {
                    Some(values) => target[..width].copy_from_slice(values),
                    None => target.iter_mut().zip(part).for_each(|(t, &x)| *t = x),
                }
            }
        }
    } else {
        // Columns (a transposed row-major matrix has contiguous columns).
        for (panel, chunk) in out.chunks_exact_mut(k * NR).enumerate() {
            for j in 0..NR.min(n - panel * NR) {
                scatter(b.column(panel * NR + j), chunk, j, NR);
            }
        }
    }
    out
}

/// Every tile of `c` (rows of `a_packed` × columns of `b_packed`), with the tile code
/// compiled for `kernel`.
#[allow(clippy::too_many_arguments)]
fn tiles(
    kernel: Kernel,
    alpha: f64,
    a_packed: &[f64],
    b_packed: &[f64],
    k: usize,
    first: usize,
    beta: f64,
    c: &mut ArrayViewMut2<'_, f64>,
) {
    match kernel {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: `kernel()` returns Avx512 only when the processor reports AVX-512F.
        Kernel::Avx512 => unsafe { tiles_avx512(alpha, a_packed, b_packed, k, first, beta, c) },
        #[cfg(target_arch = "x86_64")]
        // SAFETY: `kernel()` returns Avx2 only when the processor reports AVX2.
        Kernel::Avx2 => unsafe { tiles_avx2(alpha, a_packed, b_packed, k, first, beta, c) },
        _ => tiles_generic(alpha, a_packed, b_packed, k, first, beta, c),
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f")]
unsafe fn tiles_avx512(
    alpha: f64,
    a_packed: &[f64],
    b_packed: &[f64],
    k: usize,
    first: usize,
    beta: f64,
    c: &mut ArrayViewMut2<'_, f64>,
) {
    tiles_generic(alpha, a_packed, b_packed, k, first, beta, c)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn tiles_avx2(
    alpha: f64,
    a_packed: &[f64],
    b_packed: &[f64],
    k: usize,
    first: usize,
    beta: f64,
    c: &mut ArrayViewMut2<'_, f64>,
) {
    tiles_generic(alpha, a_packed, b_packed, k, first, beta, c)
}

/// The tile loop over the packed columns `first..first + c.ncols()`; inlined into each
/// instruction-set version above.
#[inline(always)]
fn tiles_generic(
    alpha: f64,
    a_packed: &[f64],
    b_packed: &[f64],
    k: usize,
    first: usize,
    beta: f64,
    c: &mut ArrayViewMut2<'_, f64>,
) {
    let (m, n) = c.dim();
    if k == 0 {
        c.mapv_inplace(|old| finish(alpha, 0.0, beta, old));
        return;
    }
    let panels = first / NR..(first + n).div_ceil(NR);
    for (jp, b_panel) in b_packed
        .chunks_exact(k * NR)
        .enumerate()
        .take(panels.end)
        .skip(panels.start)
    {
        // Columns of this panel that fall in the range, and where they go in `c`.
        let (panel_first, panel_end) = (jp * NR, jp * NR + NR);
        let from = first.max(panel_first);
        let to = (first + n).min(panel_end);
        for (ip, a_panel) in a_packed.chunks_exact(k * MR).enumerate() {
            let acc = tile(a_panel, b_panel);
            let i0 = ip * MR;
            for (i, row) in acc.iter().enumerate().take(m - i0) {
                let mut out = c.row_mut(i0 + i);
                for (j, &sum) in row[from - panel_first..to - panel_first].iter().enumerate() {
                    let x = &mut out[from - first + j];
                    *x = finish(alpha, sum, beta, *x);
                }
            }
        }
    }
}

/// One `MR × NR` tile: `acc[i][j] += a[p][i] · b[p][j]` for `p = 0, 1, …` in order.
/// The `j` loop is what the compiler vectorises: lanes are different outputs.
#[inline(always)]
fn tile(a_panel: &[f64], b_panel: &[f64]) -> [[f64; NR]; MR] {
    let mut acc = [[0.0f64; NR]; MR];
    let (a_rows, _) = a_panel.as_chunks::<MR>();
    let (b_rows, _) = b_panel.as_chunks::<NR>();
    for (a, b) in a_rows.iter().zip(b_rows) {
        for i in 0..MR {
            for j in 0..NR {
                acc[i][j] += a[i] * b[j];
            }
        }
    }
    acc
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::math::Stream;
    use ndarray::{Array2, ShapeBuilder};

    /// The order of the module docs, as three loops over plain indices.
    fn three_loops(alpha: f64, a: &Array2<f64>, b: &Array2<f64>, beta: f64, c: &mut Array2<f64>) {
        let (m, k) = a.dim();
        let n = b.ncols();
        for i in 0..m {
            for j in 0..n {
                let mut sum = 0.0;
                for p in 0..k {
                    sum += a[[i, p]] * b[[p, j]];
                }
                c[[i, j]] = alpha * sum + if beta == 0.0 { 0.0 } else { beta * c[[i, j]] };
            }
        }
    }

    fn random(stream: &mut Stream, rows: usize, cols: usize) -> Array2<f64> {
        // Magnitudes spread over many binades, so a different order shows in the bits.
        let x: Array2<f64> = stream.array((rows, cols), 1.0);
        x.mapv(|v| v * 2f64.powi((v * 40.0) as i32))
    }

    /// Every tile code, small and large shapes, edges, strided operands, alpha and
    /// beta: the same bits as the three plain loops.
    #[test]
    fn every_shape_gives_the_bits_of_the_plain_loops() {
        let mut stream = Stream::new(11);
        for &(m, k, n) in &[
            (1, 1, 1),
            (3, 5, 7),
            (4, 64, 8),
            (5, 64, 9),
            (33, 17, 65),
            (130, 64, 257),
            (512, 3, 40),
            (600, 70, 300),
        ] {
            let a = random(&mut stream, m, k);
            let bt = random(&mut stream, n, k);
            let b = bt.t();
            for &(alpha, beta) in &[(1.0, 0.0), (0.125, 1.0), (-0.3, 0.7)] {
                let start = random(&mut stream, m, n);
                let mut want = start.clone();
                three_loops(alpha, &a, &b.to_owned(), beta, &mut want);
                let mut got = Array2::zeros((m, n).f());
                got.assign(&start);
                gemm(alpha, &a, &b, beta, &mut got);
                let same = want
                    .iter()
                    .zip(got.iter())
                    .all(|(x, y)| x.to_bits() == y.to_bits());
                assert!(same, "m={m} k={k} n={n} alpha={alpha} beta={beta}");
            }
        }
    }

    /// A range of packed columns, aligned to a panel or not, gives the bits of the
    /// plain loops on those columns, and so does a row-major right-hand operand.
    #[test]
    fn packed_column_ranges_give_the_bits_of_the_plain_loops() {
        let mut stream = Stream::new(14);
        let (m, k, n) = (70, 64, 300);
        let a = random(&mut stream, m, k);
        let bt = random(&mut stream, n, k);
        for b in [bt.t().to_owned(), bt.t().as_standard_layout().into_owned()] {
            let packed = pack_columns(&b);
            for (first, width) in [(0, 300), (0, 17), (3, 40), (8, 8), (251, 49), (299, 1)] {
                let cols = b.slice(ndarray::s![.., first..first + width]).to_owned();
                let mut want = Array2::zeros((m, width));
                three_loops(0.25, &a, &cols, 0.0, &mut want);
                let mut got = Array2::zeros((m, width));
                gemm_packed(0.25, &a, &packed, first, 0.0, &mut got);
                let same = want
                    .iter()
                    .zip(got.iter())
                    .all(|(x, y)| x.to_bits() == y.to_bits());
                assert!(same, "columns {first}..{}", first + width);
            }
        }
    }

    /// The companion: summing the same products in another order (pairs first) changes
    /// the bits on these inputs, so the test above would see a reordered product.
    #[test]
    fn another_order_changes_the_bits() {
        let mut stream = Stream::new(12);
        let (m, k, n) = (40, 64, 40);
        let a = random(&mut stream, m, k);
        let b = random(&mut stream, k, n);
        let mut want = Array2::zeros((m, n));
        three_loops(1.0, &a, &b, 0.0, &mut want);
        let pairwise = Array2::from_shape_fn((m, n), |(i, j)| {
            (0..k)
                .step_by(2)
                .map(|p| a[[i, p]] * b[[p, j]] + a[[i, p + 1]] * b[[p + 1, j]])
                .fold(0.0, |s, x| s + x)
        });
        let differing = want
            .iter()
            .zip(pairwise.iter())
            .filter(|(x, y)| x.to_bits() != y.to_bits())
            .count();
        assert!(differing > 0);
    }

    /// Every tile code this processor can run gives the bits of the plain loops.
    #[test]
    fn every_instruction_set_gives_the_same_bits() {
        let mut stream = Stream::new(13);
        let (m, k, n) = (37, 96, 53);
        let a = random(&mut stream, m, k);
        let b = random(&mut stream, k, n);
        let (a_packed, b_packed) = (pack_a(&a.view()), pack_b(&b));
        let mut want = Array2::zeros((m, n));
        three_loops(0.5, &a, &b, 0.0, &mut want);
        let mut available = vec![Kernel::Baseline];
        #[cfg(target_arch = "x86_64")]
        {
            if std::arch::is_x86_feature_detected!("avx2") {
                available.push(Kernel::Avx2);
            }
            if std::arch::is_x86_feature_detected!("avx512f") {
                available.push(Kernel::Avx512);
            }
        }
        for kernel in available {
            let mut got = Array2::zeros((m, n));
            tiles(
                kernel,
                0.5,
                &a_packed,
                &b_packed,
                k,
                0,
                0.0,
                &mut got.view_mut(),
            );
            let same = want
                .iter()
                .zip(got.iter())
                .all(|(x, y)| x.to_bits() == y.to_bits());
            assert!(same, "{kernel:?}");
        }
    }
}
