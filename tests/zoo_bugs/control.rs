//! The kernel of `kernel.rs` without a mistake conforms: on every scheme and operation,
//! in f64, in f16 and in f32 (the dtypes the specimens declare), the core suite and
//! random cases are all within budget. So each specimen differs from a conforming
//! kernel by its one mistake, and whatever its report says is about that mistake.

use posconform::math::Dtype;

use crate::score;
use crate::specimens::{self, Expected};

/// Random cases per dtype (more than a specimen gets: a false alarm here would spoil
/// every score).
const CONTROL_FUZZ: usize = 400;

#[test]
fn the_kernel_without_a_mistake_conforms() {
    let core_len = posconform::suite::suite("core").expect("core suite").len();
    let mut problems = Vec::new();
    for dtypes in [&[Dtype::F64][..], &[Dtype::F16][..], &[Dtype::F32][..]] {
        let control = specimens::control(dtypes);
        let (s, report) = score::run_with(&control, Expected::None, CONTROL_FUZZ);
        let passed = report["counts"]["passed"].as_u64().unwrap_or(0) as usize;
        let skipped = report["counts"]["skipped"].as_u64().unwrap_or(0);
        println!(
            "control {dtypes:?}: {passed} within budget, {} over budget, {} errors, {skipped} skipped, {:.1} s",
            s.failing, s.errors, s.seconds
        );
        assert_eq!(
            passed,
            core_len + CONTROL_FUZZ,
            "{dtypes:?}: every case ran and passed"
        );
        for c in report["cases"].as_array().into_iter().flatten() {
            let kind = c["verdict"]["kind"].as_str().unwrap_or("");
            if kind != "pass" {
                problems.push(format!(
                    "{dtypes:?} {} {kind}: {}",
                    c["id"],
                    serde_json::to_string(&c["outputs"]).unwrap_or_default()
                ));
            }
        }
    }
    for p in &problems {
        println!("{p}");
    }
    assert!(
        problems.is_empty(),
        "{} cases not within budget",
        problems.len()
    );
}
