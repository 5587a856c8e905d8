//! Segment recurrence (docs/conventions.md, "stream"; Dai et al. 2019, §3.2): streaming equals the one-shot
//! definition.

use ndarray::{s, Array2, ArrayView2};
use posconform::math::Stream;
use posconform::recurrence::{
    one_shot, recurrence_visibility, stream, LayerWeights, RelativeLayer,
};
use posconform::xl_relative::RelativeParams;
use posconform::{Sinusoid, SinusoidLayout};
use proptest::prelude::*;

fn layer(seed: u64, heads: usize, d_model: usize, d: usize) -> RelativeLayer {
    let mut s = Stream::new(seed);
    let scale = 1.0 / (d_model as f64).sqrt();
    let weights = LayerWeights {
        w_q: s.array((heads, d_model, d), scale),
        w_k: s.array((heads, d_model, d), scale),
        w_v: s.array((heads, d_model, d), scale),
        w_kr: s.array((heads, d_model, d), scale),
        u: s.array((heads, d), 0.5),
        v: s.array((heads, d), 0.5),
        w_o: s.array((heads * d, d_model), 1.0 / ((heads * d) as f64).sqrt()),
    };
    let sinusoid = Sinusoid::new(d_model, 10_000.0, SinusoidLayout::Concatenated).unwrap();
    RelativeLayer::new(weights, sinusoid, RelativeParams::default()).unwrap()
}

#[derive(Debug, Clone)]
struct Stack {
    seed: u64,
    layers: usize,
    heads: usize,
    d_model: usize,
    d: usize,
    tokens: usize,
    segment: usize,
}

impl Stack {
    fn build(&self) -> (Vec<RelativeLayer>, Array2<f64>) {
        let layers = (0..self.layers)
            .map(|n| layer(self.seed + n as u64, self.heads, self.d_model, self.d))
            .collect();
        let x = Stream::new(self.seed ^ 0xabc).array((self.tokens, self.d_model), 1.0);
        (layers, x)
    }
}

fn stacks() -> impl Strategy<Value = Stack> {
    (
        any::<u64>(),
        1usize..4,
        1usize..3,
        1usize..4,
        1usize..4,
        1usize..14,
        1usize..6,
    )
        .prop_map(|(seed, layers, heads, half, d, tokens, segment)| Stack {
            seed,
            layers,
            heads,
            d_model: 2 * half,
            d,
            tokens,
            segment,
        })
}

fn max_diff(a: &Array2<f64>, b: &Array2<f64>) -> f64 {
    (a - b).iter().fold(0.0, |m, x| m.max(x.abs()))
}

/// Summation-order agreement for values of order 1 through a few layers.
const AGREE: f64 = 1e-12;

/// A streaming implementation under test.
type Streamer = dyn Fn(&[RelativeLayer], ArrayView2<'_, f64>, usize, usize) -> Array2<f64>;

/// Checks that `streamer` equals the one-shot computation in which query `t` sees
/// keys `[max(0, S - M), t]` (S the start of its segment); for `M >= T` that is plain
/// causal attention over the whole sequence.
fn streaming_matches_one_shot(
    streamer: &Streamer,
    stack: &Stack,
    memory: usize,
) -> Result<(), String> {
    let (layers, x) = stack.build();
    let streamed = streamer(&layers, x.view(), stack.segment, memory);
    let visible = recurrence_visibility(stack.segment, memory);
    let reference = if memory >= stack.tokens {
        one_shot(&layers, x.view(), &|_, _| true)
    } else {
        one_shot(&layers, x.view(), &visible)
    }
    .map_err(|e| e.to_string())?;
    let diff = max_diff(&streamed, &reference);
    if diff <= AGREE {
        Ok(())
    } else {
        Err(format!("streamed output differs from one-shot by {diff:e}"))
    }
}

fn library_stream(
    layers: &[RelativeLayer],
    x: ArrayView2<'_, f64>,
    l: usize,
    m: usize,
) -> Array2<f64> {
    stream(layers, x, l, m).unwrap()
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(48))]

    /// Streaming segment by segment with `M >= T` equals one-shot causal relative
    /// attention over the whole sequence, for stacks of 1–3 layers.
    #[test]
    fn streaming_with_full_memory_equals_one_shot(stack in stacks(), extra in 0usize..4) {
        let memory = stack.tokens + extra;
        streaming_matches_one_shot(&library_stream, &stack, memory).map_err(TestCaseError::fail)?;
    }

    /// With `M < T` each query sees exactly the keys the recurrence gives it: the
    /// streamed output equals the one-shot computation restricted to
    /// `[max(0, S - M), t]` per query, layer by layer.
    #[test]
    fn streaming_with_short_memory_sees_recurrence_window(stack in stacks(), memory in 0usize..6) {
        prop_assume!(memory < stack.tokens);
        streaming_matches_one_shot(&library_stream, &stack, memory).map_err(TestCaseError::fail)?;
    }
}

/// Planted bug (`memory-keeps-oldest`): the memory update keeps the oldest rows instead of the
/// newest. The one-shot comparison must catch it once the memory has to drop rows.
#[test]
fn planted_memory_keeping_oldest_rows_is_caught() {
    let oldest_kept = |layers: &[RelativeLayer], x: ArrayView2<'_, f64>, l: usize, m: usize| {
        let d_model = x.ncols();
        let mut memories = vec![Array2::<f64>::zeros((0, d_model)); layers.len()];
        let mut out = Array2::zeros(x.raw_dim());
        for start in (0..x.nrows()).step_by(l) {
            let end = (start + l).min(x.nrows());
            let mut hidden = x.slice(s![start..end, ..]).to_owned();
            for (layer, memory) in layers.iter().zip(memories.iter_mut()) {
                let next = layer.forward(memory.view(), hidden.view()).unwrap();
                let joined = ndarray::concatenate![ndarray::Axis(0), memory.view(), hidden.view()];
                *memory = joined.slice(s![..m.min(joined.nrows()), ..]).to_owned();
                hidden = next;
            }
            out.slice_mut(s![start..end, ..]).assign(&hidden);
        }
        out
    };
    let stack = Stack {
        seed: 3,
        layers: 2,
        heads: 2,
        d_model: 4,
        d: 3,
        tokens: 12,
        segment: 3,
    };
    assert!(streaming_matches_one_shot(&library_stream, &stack, 2).is_ok());
    assert!(streaming_matches_one_shot(&oldest_kept, &stack, 2).is_err());
}

/// The short-memory window really restricts attention: with `T > L + M` the windowed
/// one-shot differs from full causal attention (so the property above is not vacuous).
#[test]
fn short_memory_window_differs_from_full_causal() {
    let stack = Stack {
        seed: 9,
        layers: 1,
        heads: 1,
        d_model: 4,
        d: 2,
        tokens: 10,
        segment: 3,
    };
    let (layers, x) = stack.build();
    let full = one_shot(&layers, x.view(), &|_, _| true).unwrap();
    let windowed = one_shot(&layers, x.view(), &recurrence_visibility(3, 2)).unwrap();
    assert!(max_diff(&full, &windowed) > 1e-6);
    // Queries of the first segment see the same keys either way.
    assert!(
        max_diff(
            &full.slice(s![..3, ..]).to_owned(),
            &windowed.slice(s![..3, ..]).to_owned()
        ) <= AGREE
    );
}
