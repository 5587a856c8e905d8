//! Position aliasing: positions restarting at each segment give distinct tokens one
//! encoding (docs/conventions.md, "learned"); relative distances never do.

use ndarray::Array2;
use posconform::learned::{aliased_pairs, LearnedTable};
use posconform::math::Stream;
use posconform::{Sinusoid, Window};
use proptest::prelude::*;

/// Absolute positions of `[memory ; current]` tokens for a segment starting at
/// `start`: true positions, or (the bug) positions restarting at 0 in every segment.
fn key_positions(start: usize, memory: usize, segment: usize, restart: bool) -> Vec<i64> {
    (start - memory..start + segment)
        .map(|t| {
            if restart {
                (t % segment) as i64
            } else {
                t as i64
            }
        })
        .collect()
}

/// Distances from each query of the window to each key, as one-column "encodings",
/// with the in-segment index used for keys when `ignore_memory` (the planted bug).
fn distance_rows(window: Window, query: usize, ignore_memory: bool) -> Array2<f64> {
    let l = window.query_len();
    Array2::from_shape_fn((window.key_len(), 1), |(j, _)| {
        if ignore_memory {
            query as f64 - (j % l) as f64
        } else {
            window.distance(query, j) as f64
        }
    })
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(64))]

    /// With positions restarting per segment, the sinusoid and a learned table both
    /// give identical encodings to distinct absolute positions once memory is
    /// non-empty; with true positions neither does.
    #[test]
    fn restarting_positions_alias_true_positions_do_not(
        segment in 1usize..8, memory_extra in 0usize..8, half in 1usize..6, seed in any::<u64>()
    ) {
        let memory = memory_extra + 1;
        let start = memory + segment;
        let absolute: Vec<i64> = key_positions(start, memory, segment, false);
        let restarted = key_positions(start, memory, segment, true);
        let pe = Sinusoid::paper(2 * half).unwrap();
        prop_assert!(!aliased_pairs(pe.table(&restarted).view(), &absolute).is_empty());
        prop_assert!(aliased_pairs(pe.table(&absolute).view(), &absolute).is_empty());

        let table = LearnedTable::new(Stream::new(seed).array((64, 2 * half), 1.0)).unwrap();
        prop_assert!(!aliased_pairs(table.lookup(&restarted).unwrap().view(), &absolute).is_empty());
        prop_assert!(aliased_pairs(table.lookup(&absolute).unwrap().view(), &absolute).is_empty());
    }

    /// Relative distances `Δ = M + i - j` from one query are distinct for distinct keys
    /// of `[memory ; current]`, so relative encodings never alias.
    #[test]
    fn relative_distances_never_alias(segment in 1usize..8, memory in 0usize..12, query_pick in 0usize..8) {
        let window = Window::new(memory, segment).unwrap();
        let query = query_pick % segment;
        let keys: Vec<i64> = (0..window.key_len() as i64).collect();
        prop_assert!(aliased_pairs(distance_rows(window, query, false).view(), &keys).is_empty());
    }
}

/// Planted bug: distances measured to the key's in-segment index (memory ignored)
/// collide between memory and current keys, and the detector reports it.
#[test]
fn planted_in_segment_distance_aliases() {
    let window = Window::new(4, 4).unwrap();
    let keys: Vec<i64> = (0..8).collect();
    assert!(!aliased_pairs(distance_rows(window, 2, true).view(), &keys).is_empty());
}

/// A learned table never wraps or clamps: position `L_max` and negative positions are
/// errors that name the position.
#[test]
fn learned_table_rejects_out_of_range_positions() {
    let table = LearnedTable::new(Stream::new(1).array((16, 4), 1.0)).unwrap();
    assert_eq!(
        table.lookup(&[15]).unwrap().row(0),
        table.as_array().row(15)
    );
    for bad in [16i64, 17, -1, i64::MAX] {
        let err = table.lookup(&[0, bad]).unwrap_err().to_string();
        assert!(
            err.contains(&bad.to_string()) && err.contains("never wrapped"),
            "{err}"
        );
    }
}
