//! Mistakes in the bucketed relative bias (Raffel et al. 2020, T5): direction, the
//! bidirectional split, the cap at the last bucket, the logarithmic rounding.

use ndarray::{Array1, Array3, ArrayD, ArrayView3};

use super::scheme_in;
use crate::case::Case;
use crate::diagnose::{Fault, FaultKind, FaultVariant, Matching};
use crate::error::Result;
use crate::scheme::bucketed::{bucket, BucketedSpec, Buckets};
use crate::scheme::model::{Inputs, PairPositions};
use crate::scheme::{Scheme, SchemeSpec};
use crate::variant::{Deviation, WindowCtx};

fn spec(case: &Case) -> Option<&BucketedSpec> {
    match &case.scheme {
        SchemeSpec::Bucketed(spec) => Some(spec),
        _ => None,
    }
}

/// A bucket rule written the way a kernel writes it, with the knobs its mistakes turn.
#[derive(Clone, Copy)]
struct Rule {
    num_buckets: usize,
    max_distance: usize,
    bidirectional: bool,
    /// Halve the bucket count for one direction before deriving max_exact and the log
    /// range (the published rule does).
    halve: bool,
    /// Cap at the last bucket of the direction (the published rule does).
    cap: bool,
    /// Round the logarithmic part to nearest instead of truncating.
    round: bool,
}

impl Rule {
    fn of(spec: &BucketedSpec) -> Self {
        Rule {
            num_buckets: spec.num_buckets,
            max_distance: spec.max_distance,
            bidirectional: spec.bidirectional,
            halve: true,
            cap: true,
            round: false,
        }
    }

    /// The bucket of `relative_position = pos_key - pos_query` (the T5 operation order).
    fn bucket(&self, relative_position: i64) -> usize {
        let mut per_direction = self.num_buckets;
        let n = -(relative_position as i128);
        let (offset, n) = if self.bidirectional {
            let half = self.num_buckets / 2;
            if self.halve {
                per_direction = half;
            }
            (if n < 0 { half } else { 0 }, n.unsigned_abs())
        } else {
            (0, n.max(0) as u128)
        };
        let max_exact = (per_direction / 2).max(1);
        let within = if n < max_exact as u128 {
            n as usize
        } else {
            let fraction = libm::log(n as f64 / max_exact as f64)
                / libm::log(self.max_distance as f64 / max_exact as f64)
                * (per_direction - max_exact) as f64;
            let fraction = if self.round {
                fraction.round()
            } else {
                fraction
            };
            let large = max_exact.saturating_add(fraction as usize);
            if self.cap {
                large.min(per_direction - 1)
            } else {
                large
            }
        };
        offset + within
    }
}

/// A faulty bucket rule: `rule(spec)` and whether relative positions are negated.
pub(super) struct Faulty {
    rule: fn(&BucketedSpec) -> Rule,
    negate: bool,
}

impl Faulty {
    fn bucket(&self, spec: &BucketedSpec, relative_position: i64) -> usize {
        let r = if self.negate {
            relative_position.saturating_neg()
        } else {
            relative_position
        };
        (self.rule)(spec).bucket(r)
    }
}

impl Deviation for Faulty {
    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        let Some(spec) = spec(case) else {
            return Ok(table);
        };
        let relative = inputs.positions("relative_positions")?;
        Ok(Array1::from_iter(relative.iter().map(|&r| self.bucket(spec, r) as f64)).into_dyn())
    }

    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        _q: ArrayView3<'_, f64>,
        _k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        mut scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        let Some(spec) = spec(ctx.case) else {
            return Ok(scores);
        };
        let table = ctx.inputs.get2("bias_table")?;
        let right = Buckets::new(spec.num_buckets, spec.max_distance, spec.bidirectional)?;
        for ((h, i, j), s) in scores.indexed_iter_mut() {
            let relative = -positions.distance(i, j);
            let wrong = self.bucket(spec, relative);
            *s += match table.get([h, wrong]) {
                Some(&b) => b - table[[h, bucket(relative, &right)]],
                // Past the table: the kernel reads out of bounds.
                None => f64::NAN,
            };
        }
        Ok(scores)
    }
}

impl FaultVariant for Faulty {
    fn applies(&self, case: &Case) -> bool {
        scheme_in(case, &[Scheme::Bucketed])
    }
}

pub(super) const BUCKET_DIRECTION_FLIPPED: Fault = Fault {
    id: "bucket-direction-flipped",
    mistake: "The bucket is computed from pos_query - pos_key instead of pos_key - pos_query: \
              past and future keys trade buckets (for a causal rule, every past key lands in \
              bucket 0).",
    arises: "context_position - memory_position for memory_position - context_position when \
             building the relative position matrix.",
    exposes: "Every bucketed case (encode returns the buckets themselves).",
    fix: "relative_position = pos_key - pos_query (negative for earlier keys), then the bucket \
          rule.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Faulty {
        rule: Rule::of,
        negate: true,
    },
};

pub(super) const BUCKET_BIDIRECTIONAL_FLAG_WRONG: Fault = Fault {
    id: "bucket-bidirectional-flag-wrong",
    mistake: "The bidirectional flag is wrong: an encoder's two-sided rule used in a causal \
              decoder, or the reverse, so past distances get half (or twice) the buckets.",
    arises: "One helper shared by encoder and decoder with the flag left at its default.",
    exposes: "Every bucketed case (encode returns the buckets themselves).",
    fix: "bidirectional = true for encoder self-attention, false for causal decoder \
          self-attention, as the case says.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Faulty {
        rule: |spec| Rule {
            bidirectional: !spec.bidirectional,
            ..Rule::of(spec)
        },
        negate: false,
    },
};

pub(super) const BUCKET_CAP_MISSING: Fault = Fault {
    id: "bucket-cap-missing",
    mistake: "The logarithmic buckets are not capped at the last bucket of their direction: \
              distances beyond max_distance get bucket numbers past the end.",
    arises: "The min(val_if_large, num_buckets - 1) line left out; the bias lookup then reads \
             another direction's row or out of bounds.",
    exposes: "Bucketed cases with distances beyond max_distance (the suite's beyond-max-distance \
              cases; encode reaches twice max_distance).",
    fix: "Cap: bucket = min(max_exact + log part, buckets per direction - 1).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Faulty {
        rule: |spec| Rule {
            cap: false,
            ..Rule::of(spec)
        },
        negate: false,
    },
};

pub(super) const BUCKET_LOG_ROUNDED: Fault = Fault {
    id: "bucket-log-rounded",
    mistake: "The logarithmic part of the bucket is rounded to nearest instead of truncated, so \
              some distances land one bucket higher.",
    arises: "round() or a float-to-int conversion that rounds, where the published code \
             truncates with .to(long) / int().",
    exposes: "Bucketed cases with distances past max_exact (most encode cases; scores with long \
              memory).",
    fix: "Truncate toward zero: max_exact + int(log(n/max_exact)/log(max_distance/max_exact) · \
          (buckets - max_exact)).",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &Faulty {
        rule: |spec| Rule {
            round: true,
            ..Rule::of(spec)
        },
        negate: false,
    },
};

pub(super) const BUCKET_EXACT_RANGE_NOT_HALVED: Fault = Fault {
    id: "bucket-exact-range-not-halved",
    mistake: "A bidirectional rule offsets future keys by half the buckets but derives max_exact \
              and the logarithmic range from all of them, so past distances spill into the \
              future half.",
    arises: "ret += (n < 0) * (num_buckets // 2) without also setting num_buckets //= 2 before \
             max_exact is computed.",
    exposes: "Bidirectional bucketed cases.",
    fix: "Halve the bucket count first, then compute the direction offset, max_exact and the \
          logarithmic range from the halved count.",
    kind: FaultKind::Bug,
    matching: Matching::Values,
    variant: &BucketRangeNotHalved,
};

pub(super) struct BucketRangeNotHalved;

impl Deviation for BucketRangeNotHalved {
    fn encode(
        &self,
        case: &Case,
        inputs: &Inputs<'_, '_>,
        table: ArrayD<f64>,
    ) -> Result<ArrayD<f64>> {
        NOT_HALVED.encode(case, inputs, table)
    }

    fn scores(
        &self,
        ctx: &WindowCtx<'_, '_>,
        q: ArrayView3<'_, f64>,
        k: ArrayView3<'_, f64>,
        positions: &PairPositions,
        scores: Array3<f64>,
    ) -> Result<Array3<f64>> {
        NOT_HALVED.scores(ctx, q, k, positions, scores)
    }
}

impl FaultVariant for BucketRangeNotHalved {
    fn applies(&self, case: &Case) -> bool {
        spec(case).is_some_and(|s| s.bidirectional)
    }
}

const NOT_HALVED: Faulty = Faulty {
    rule: |spec| Rule {
        halve: false,
        ..Rule::of(spec)
    },
    negate: false,
};
