//! Summaries of repeated timings: order statistics and the noise figures the reports
//! and the gate use.
//!
//! Quantiles interpolate linearly between order statistics (the "type 7" definition of
//! Hyndman and Fan, 1996, the default of R and numpy). The standard error of a median
//! is taken as `1.2533 σ / √n` with `σ = IQR / 1.349`: the large-sample standard error
//! of the median of a normal sample, with σ estimated robustly from the interquartile
//! range (both common practice).
//!
//! Timing noise is not normal: other processes only ever add time, so on a busy machine
//! the distribution grows a long right tail, or a second mode, while its floor stays
//! put. The floor (the fastest run) is therefore the figure the gate compares (Python's
//! `timeit` documentation makes the same argument for the minimum of repeated timings).
//!
//! One floor from one stretch of runs is not enough: measured on a 2-core machine, the
//! floors of separate runs of the same workload differed by up to +135% while each
//! run's own fastest-to-third-fastest gap was 2% to 9%; whatever moves a floor (the
//! state of the other core, of the caches, of the clock) holds for a stretch of runs
//! and changes between stretches. So the runs are timed in blocks spread over the
//! whole bench ([`super::measure`]), the figure is the median of the blocks' floors
//! ([`BlockFloors`]), and its noise is half their range. For five blocks, whose floors
//! vary with some σ, the expected range of five normal samples is 2.326σ (the
//! control-chart constant d₂ for five, from memory) and the standard error of their
//! median about 1.2533σ/√5 ≈ 0.56σ (common practice), so half the range is about two
//! standard errors of the figure (our choice).
//!
//! With a single block the noise falls back to the gap between the fastest and the
//! third-fastest run, `(third - min) / min`.

/// Order statistics of a set of samples (milliseconds, or any positive quantity).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Summary {
    /// Number of samples.
    pub count: usize,
    /// Smallest sample.
    pub min: f64,
    /// First quartile.
    pub q1: f64,
    /// Median.
    pub median: f64,
    /// Third quartile.
    pub q3: f64,
    /// Largest sample.
    pub max: f64,
    /// The third-smallest sample (the largest one when there are fewer than three).
    pub third: f64,
}

impl Summary {
    /// The summary of `samples`; `None` when there are none or any is not finite.
    pub fn of(samples: &[f64]) -> Option<Summary> {
        if samples.is_empty() || samples.iter().any(|x| !x.is_finite()) {
            return None;
        }
        let mut sorted = samples.to_vec();
        sorted.sort_by(f64::total_cmp);
        Some(Summary {
            count: sorted.len(),
            min: sorted[0],
            q1: quantile(&sorted, 0.25),
            median: quantile(&sorted, 0.5),
            q3: quantile(&sorted, 0.75),
            max: sorted[sorted.len() - 1],
            third: sorted[2.min(sorted.len() - 1)],
        })
    }

    /// The interquartile range relative to the median: the noise of one sample.
    pub fn spread(&self) -> f64 {
        if self.median > 0.0 {
            (self.q3 - self.q1) / self.median
        } else {
            0.0
        }
    }

    /// The relative standard error of the median (see the module docs).
    pub fn median_error(&self) -> f64 {
        1.2533 * (self.spread() / 1.349) / (self.count as f64).sqrt()
    }

    /// The noise of a floor from a single block: `(third - min) / min` (see the module
    /// docs).
    pub fn floor_noise(&self) -> f64 {
        if self.min > 0.0 {
            (self.third - self.min) / self.min
        } else {
            0.0
        }
    }
}

/// The floor ratios of a workload's blocks (at least two).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct BlockFloors {
    /// Number of blocks.
    pub count: usize,
    /// The lowest block floor.
    pub min: f64,
    /// The median block floor: the workload's figure.
    pub median: f64,
    /// The highest block floor.
    pub max: f64,
}

impl BlockFloors {
    /// `None` with fewer than two blocks or a floor that is not finite and positive.
    pub fn of(floors: &[f64]) -> Option<BlockFloors> {
        if floors.len() < 2 || floors.iter().any(|x| !(x.is_finite() && *x > 0.0)) {
            return None;
        }
        let mut sorted = floors.to_vec();
        sorted.sort_by(f64::total_cmp);
        Some(BlockFloors {
            count: sorted.len(),
            min: sorted[0],
            median: quantile(&sorted, 0.5),
            max: sorted[sorted.len() - 1],
        })
    }

    /// The relative noise of the median: the range of the block floors over twice the
    /// median (see the module docs).
    pub fn noise(&self) -> f64 {
        (self.max - self.min) / (2.0 * self.median)
    }
}

/// The `p` quantile of sorted, non-empty `sorted`, interpolated linearly.
pub fn quantile(sorted: &[f64], p: f64) -> f64 {
    let position = p.clamp(0.0, 1.0) * (sorted.len() - 1) as f64;
    let below = position.floor() as usize;
    let above = position.ceil() as usize;
    let fraction = position - below as f64;
    sorted[below] + (sorted[above] - sorted[below]) * fraction
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quartiles_interpolate_between_order_statistics() {
        // 1..=5: positions 1, 2, 3 of 0..4 are exact order statistics.
        let s = Summary::of(&[5.0, 1.0, 4.0, 2.0, 3.0]).unwrap();
        assert_eq!(
            (s.min, s.q1, s.median, s.q3, s.max),
            (1.0, 2.0, 3.0, 4.0, 5.0)
        );
        // Fastest 1, third-fastest 3: the floor moves by 200%.
        assert_eq!((s.third, s.floor_noise()), (3.0, 2.0));
        let two = Summary::of(&[2.0, 2.5]).unwrap();
        assert_eq!((two.third, two.floor_noise()), (2.5, 0.25));
        // 1..=4: the median sits halfway between 2 and 3, q1 at position 0.75.
        let s = Summary::of(&[4.0, 3.0, 2.0, 1.0]).unwrap();
        assert_eq!((s.q1, s.median, s.q3), (1.75, 2.5, 3.25));
        assert!(Summary::of(&[]).is_none());
        assert!(Summary::of(&[1.0, f64::NAN]).is_none());
    }

    #[test]
    fn block_floors_give_the_median_and_half_the_range() {
        // Floors 1.0, 1.2, 0.9, 1.1, 1.4: median 1.1, range 0.5, noise 0.5 / 2.2.
        let b = BlockFloors::of(&[1.0, 1.2, 0.9, 1.1, 1.4]).unwrap();
        assert_eq!((b.count, b.min, b.median, b.max), (5, 0.9, 1.1, 1.4));
        assert!((b.noise() - 0.5 / 2.2).abs() < 1e-15);
        // Two blocks: the median is their mean.
        let two = BlockFloors::of(&[2.0, 3.0]).unwrap();
        assert_eq!((two.median, two.noise()), (2.5, 0.2));
        assert!(BlockFloors::of(&[1.0]).is_none());
        assert!(BlockFloors::of(&[1.0, f64::NAN]).is_none());
        assert!(BlockFloors::of(&[1.0, 0.0]).is_none());
    }

    #[test]
    fn median_error_shrinks_with_the_square_root_of_the_count() {
        // Spread 0.5 (q1 = 0.75, q3 = 1.25 around a median of 1) over 4 and 16 samples
        // with the same quartiles: 1.2533 * (0.5 / 1.349) / 2 and / 4.
        let four = Summary {
            count: 4,
            min: 0.5,
            q1: 0.75,
            median: 1.0,
            q3: 1.25,
            max: 2.0,
            third: 1.25,
        };
        let sixteen = Summary { count: 16, ..four };
        assert!((four.median_error() - 0.232_265).abs() < 1e-6);
        assert!((sixteen.median_error() - 0.116_132).abs() < 1e-6);
    }
}
