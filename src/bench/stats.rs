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
//! Its noise is the relative gap between the fastest and the third-fastest run: when
//! the runs are resampled with replacement, the fastest of a resample is one of those
//! three with probability `1 - (1 - 3/n)^n` (96.5% for `n = 15`), so the gap is how
//! far the floor moves between comparable runs.

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

    /// The noise of the floor: `(third - min) / min` (see the module docs).
    pub fn floor_noise(&self) -> f64 {
        if self.min > 0.0 {
            (self.third - self.min) / self.min
        } else {
            0.0
        }
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
