//! Every correct variant through the checker on the `core` suite and a fixed small fuzz
//! budget: zero over budget, zero errors. Cases a variant declines by design (ALiBi
//! scores in the key-position form) are the only skips.

use crate::harness::{run, Tally};
use crate::variants;

/// Random cases per variant after the suite (a fixed budget that fits CI).
pub const FUZZ_CASES: usize = 400;
/// Seed of the fuzzer.
pub const FUZZ_SEED: u64 = 0x200;

#[test]
fn zoo_core() {
    let core = posconform::suite::suite("core").expect("core suite");
    let mut problems = Vec::new();
    let mut unexpected_skips = Vec::new();
    println!("variant                        run  over  errors  skipped");
    for v in variants::correct() {
        let (_, f) = run(&v, &core, FUZZ_CASES, FUZZ_SEED);
        let Tally {
            run,
            over,
            errors,
            skipped,
        } = f.tally;
        println!("{:<28} {run:>5} {over:>5} {errors:>7} {skipped:>8}", v.name);
        problems.extend(f.lines);
        unexpected_skips.extend(
            f.skips
                .into_iter()
                .filter(|s| !(v.name == "alibi-key-position" && s.contains("alibi.scores"))),
        );
    }
    for p in &problems {
        println!("{p}");
    }
    assert!(
        unexpected_skips.is_empty(),
        "suite cases skipped without a design reason:\n{}",
        unexpected_skips.join("\n")
    );
    assert!(
        problems.is_empty(),
        "{} findings (listed above)",
        problems.len()
    );
}
