//! The calibration workloads: a fixed matrix product (arithmetic) and a fixed memory
//! sweep (bandwidth), timed between the runs of every workload in the same process, so
//! that a workload's time can be given as a ratio that carries from one machine to
//! another and stays put when a shared machine slows down for a while.
//!
//! At the start of every block, after a pause that lets the kernel's own threads go
//! idle, a few probes time the product alone and on every core at once ([`Probe`]):
//! the machine's **headroom**, the product alone over the concurrent products, is near
//! 1 when the other cores are free and falls towards `1/cores` when other processes
//! hold them. It is not part of any ratio; the gate
//! compares it between a run and its baseline ([`super::gate`]), since a kernel that
//! runs on several threads slows down with a busy core far more than the single-thread
//! calibration does.
//!
//! Both are plain loops written here and nowhere else, deliberately independent of the
//! library's own matrix product (which gets faster as the library improves; a
//! calibration must not). Changing either one changes every ratio: it needs a new
//! [`CALIBRATION`] name, which makes older baselines refuse to compare.

use std::hint::black_box;
use std::time::Instant;

/// The name of this calibration; a baseline made with another is not compared.
pub const CALIBRATION: &str = "product-f64-128+sweep-f64-32MiB";
/// Side of the square f64 matrices of the product.
pub const PRODUCT_SIZE: usize = 128;
/// Bytes the sweep reads and writes (f64 elements), beyond the caches of most machines'
/// share per core.
pub const SWEEP_BYTES: usize = 32 << 20;

/// The calibration workloads with their buffers, allocated once.
pub struct Calibration {
    a: Vec<f64>,
    b: Vec<f64>,
    c: Vec<f64>,
    sweep: Vec<f64>,
    /// One output per core for the concurrent products.
    lanes: Vec<Vec<f64>>,
}

/// One timing of both calibration workloads, in milliseconds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Sample {
    /// The matrix product.
    pub product_ms: f64,
    /// The memory sweep.
    pub sweep_ms: f64,
}

/// One headroom probe, in milliseconds ([`PROBE_PRODUCTS`] products each way).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Probe {
    /// The product alone.
    pub alone_ms: f64,
    /// The product on every core at once, from before the threads start to after the
    /// last one ends (the product alone on a machine with one core).
    pub together_ms: f64,
}

impl Sample {
    /// The calibration unit: the geometric mean of the two times, so that a workload
    /// bound by arithmetic and one bound by memory traffic are both measured against
    /// something that moves with them (our choice, documented in docs/bench.md).
    pub fn unit_ms(&self) -> f64 {
        (self.product_ms * self.sweep_ms).sqrt()
    }
}

impl Calibration {
    /// Allocates and fills the buffers (about 32.4 MB).
    pub fn new() -> Self {
        let n = PRODUCT_SIZE * PRODUCT_SIZE;
        // Fixed, exactly representable values: the work does not depend on data, and
        // nothing overflows or turns subnormal.
        let a = (0..n).map(|i| ((i % 7) as f64 - 3.0) * 0.125).collect();
        let b = (0..n).map(|i| ((i % 5) as f64 - 2.0) * 0.25).collect();
        Calibration {
            a,
            b,
            c: vec![0.0; n],
            sweep: vec![1.0; SWEEP_BYTES / std::mem::size_of::<f64>()],
            lanes: vec![vec![0.0; n]; cores()],
        }
    }

    /// `C = A·B` for the fixed 128 × 128 matrices, in i-k-j order (contiguous inner
    /// loop, which compilers vectorise).
    fn product(&mut self) {
        multiply(&self.a, &self.b, &mut self.c);
    }

    /// The product on every lane at once: the time from before the threads start to
    /// after the last has finished, so that a thread kept waiting for a core counts.
    fn parallel(&mut self) -> f64 {
        let started = Instant::now();
        if self.lanes.len() < 2 {
            for _ in 0..PROBE_PRODUCTS {
                self.product();
            }
            return started.elapsed().as_secs_f64() * 1e3;
        }
        let (a, b) = (&self.a, &self.b);
        std::thread::scope(|scope| {
            for c in self.lanes.iter_mut() {
                scope.spawn(move || {
                    for _ in 0..PROBE_PRODUCTS {
                        multiply(a, b, c);
                    }
                });
            }
        });
        started.elapsed().as_secs_f64() * 1e3
    }

    /// Reads and writes every element of the sweep buffer once (`x ← x/2 + 1`, which
    /// stays at 2 once there).
    fn sweep(&mut self) {
        for x in self.sweep.iter_mut() {
            *x = *x * 0.5 + 1.0;
        }
        black_box(&self.sweep);
    }

    /// Times both workloads once.
    pub fn sample(&mut self) -> Sample {
        let started = Instant::now();
        self.product();
        let product_ms = started.elapsed().as_secs_f64() * 1e3;
        let started = Instant::now();
        self.sweep();
        let sweep_ms = started.elapsed().as_secs_f64() * 1e3;
        Sample {
            product_ms,
            sweep_ms,
        }
    }

    /// Times one headroom probe.
    pub fn probe(&mut self) -> Probe {
        let started = Instant::now();
        for _ in 0..PROBE_PRODUCTS {
            self.product();
        }
        let alone_ms = started.elapsed().as_secs_f64() * 1e3;
        Probe {
            alone_ms,
            together_ms: self.parallel(),
        }
    }
}

/// Products in a row per probe, alone and on each core: about 3 ms on a current core,
/// a scheduler's time slice, so that a core shared with another process shows as the
/// share it gives (with one product, 0.4 ms, thread start-up dominated and idle runs
/// read anywhere from 0.49 to 0.76; with eight, mostly 0.82 to 0.95, and 0.47 to 0.55
/// beside a busy loop holding one of two cores; our choice).
const PROBE_PRODUCTS: usize = 8;

/// The most cores the headroom probe uses.
const MAX_LANES: usize = 64;

/// The cores the headroom probe runs on: the machine's available parallelism, at most
/// [`MAX_LANES`].
pub fn cores() -> usize {
    std::thread::available_parallelism()
        .map_or(1, usize::from)
        .min(MAX_LANES)
}

/// `c = a·b` for square [`PRODUCT_SIZE`] matrices, in i-k-j order (contiguous inner
/// loop, which compilers vectorise).
fn multiply(a: &[f64], b: &[f64], c: &mut [f64]) {
    let n = PRODUCT_SIZE;
    c.iter_mut().for_each(|x| *x = 0.0);
    for i in 0..n {
        for k in 0..n {
            let aik = a[i * n + k];
            let row = &b[k * n..(k + 1) * n];
            let out = &mut c[i * n..(i + 1) * n];
            for (o, b) in out.iter_mut().zip(row) {
                *o += aik * b;
            }
        }
    }
    black_box(c);
}

impl Default for Calibration {
    fn default() -> Self {
        Self::new()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_product_computes_a_times_b() {
        let mut c = Calibration::new();
        c.product();
        let n = PRODUCT_SIZE;
        // One element by the definition, summed independently.
        let (i, j) = (5, 9);
        let expected: f64 = (0..n).map(|k| c.a[i * n + k] * c.b[k * n + j]).sum();
        assert_eq!(c.c[i * n + j], expected);
    }
}
