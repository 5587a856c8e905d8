//! Built-in suites of cases, kept as data (`core.json`, `long.json` next to this file):
//! each entry is a case object as in a vector file (docs/conventions.md), without its
//! seed, which is derived from the case id (FNV-1a, so adding a case never reseeds the
//! others).
//!
//! - `core`: small (committed under `vectors/core`, runs in seconds); every scheme with
//!   every operation, every value of every enumerated parameter (docs/protocol.md,
//!   "Capabilities") in an operation that attends, rotary attention with memory in f32
//!   in both pairings, and together every catalogued fault of docs/faults.md, with positions
//!   far from 0, odd L, M = 0, M < L, M > L, L = 1, head widths 64, 80 and 96, scales
//!   other than the default, non-power-of-two head counts and fully masked rows.
//! - `long`: long positions (up to 10^6), L and M up to 2048, half-precision dtypes;
//!   generated on demand by `posconform emit`, never committed.

use serde_json::Value;

use crate::case::Case;
use crate::error::{Error, Result};

/// The names of the built-in suites.
pub const SUITES: &[&str] = &["core", "long"];

/// The cases of the suite called `name`.
pub fn suite(name: &str) -> Result<Vec<Case>> {
    let text = match name {
        "core" => include_str!("core.json"),
        "long" => include_str!("long.json"),
        _ => {
            return Err(Error::param(
                "suite",
                format!("one of {}", SUITES.join(", ")),
                name,
            ))
        }
    };
    let location = format!("suite {name} (src/suite/{name}.json)");
    let entries: Vec<Value> = serde_json::from_str(text)
        .map_err(|e| Error::format(&location, format!("malformed: {e}")))?;
    entries
        .into_iter()
        .map(|mut entry| {
            let id = entry
                .get("id")
                .and_then(Value::as_str)
                .unwrap_or_default()
                .to_string();
            if let Some(object) = entry.as_object_mut() {
                object.insert("seed".into(), Value::from(seed_of(&id)));
            }
            let case: Case = serde_json::from_value(entry)
                .map_err(|e| Error::format(format!("{location}, case {id}"), e.to_string()))?;
            case.validate()?;
            Ok(case)
        })
        .collect()
}

/// A stable seed per case id (FNV-1a, 64 bits).
pub fn seed_of(id: &str) -> u64 {
    id.bytes().fold(0xcbf2_9ce4_8422_2325, |h, b| {
        (h ^ b as u64).wrapping_mul(0x0100_0000_01b3)
    })
}
