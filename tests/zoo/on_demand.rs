//! The full zoo run, on demand (minutes, not for CI):
//!
//! ```sh
//! cargo test --release --test zoo -- --ignored --nocapture zoo_full
//! ```
//!
//! Each correct variant through the `core` suite, the `long` suite and 10 fuzz seeds ×
//! 2000 random cases, via `posconform::check::check`. Prints a table (variant → cases
//! run / over budget / errors / skipped, per part) and every finding (suite failures,
//! and the first fuzz failure of each scheme and operation per seed, shrunk), then
//! asserts zero over budget and zero errors. `ZOO_ONLY=name,name` limits the run to
//! the named variants.

use crate::harness::{run, Findings, Tally};
use crate::variants;

/// Fuzz seeds of the full run.
pub const SEEDS: [u64; 10] = [1, 2, 3, 4, 5, 6, 7, 8, 9, 10];
/// Random cases per seed.
pub const CASES_PER_SEED: usize = 2000;

fn cell(t: Tally) -> String {
    format!("{}/{}/{}/{}", t.run, t.over, t.errors, t.skipped)
}

#[test]
#[ignore = "minutes: run on demand (see the module docs)"]
fn zoo_full() {
    let core = posconform::suite::suite("core").expect("core suite");
    let long = posconform::suite::suite("long").expect("long suite");
    let mut rows = Vec::new();
    let mut findings: Vec<String> = Vec::new();
    let mut grand = Tally::default();
    let only: Option<Vec<String>> = std::env::var("ZOO_ONLY")
        .ok()
        .map(|s| s.split(',').map(|n| n.trim().to_string()).collect());
    for v in variants::correct() {
        if only.as_ref().is_some_and(|o| !o.contains(&v.name)) {
            continue;
        }
        let started = std::time::Instant::now();
        let (_, c) = run(&v, &core, 0, 0);
        let (_, l) = run(&v, &long, 0, 0);
        let mut fuzz = Findings::default();
        for seed in SEEDS {
            let (_, f) = run(&v, &[], CASES_PER_SEED, seed);
            fuzz.tally += f.tally;
            fuzz.lines.extend(f.lines);
        }
        let mut total = c.tally;
        total += l.tally;
        total += fuzz.tally;
        grand += total;
        rows.push(format!(
            "{:<26} {:>16} {:>16} {:>22} {:>22} {:>6.0}s",
            v.name,
            cell(c.tally),
            cell(l.tally),
            cell(fuzz.tally),
            cell(total),
            started.elapsed().as_secs_f64()
        ));
        println!("{}", rows.last().expect("just pushed"));
        findings.extend(c.lines);
        findings.extend(l.lines);
        findings.extend(fuzz.lines);
    }
    println!("\nrun/over budget/errors/skipped per part:");
    println!(
        "{:<26} {:>16} {:>16} {:>22} {:>22} {:>7}",
        "variant", "core", "long", "fuzz 10x2000", "total", "time"
    );
    for r in &rows {
        println!("{r}");
    }
    println!("\nfindings:");
    for f in &findings {
        println!("{f}");
    }
    assert_eq!(
        (grand.over, grand.errors),
        (0, 0),
        "over budget and errors over the whole zoo (findings above)"
    );
}
