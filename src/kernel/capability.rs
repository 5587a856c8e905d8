//! Capabilities a kernel declares in the handshake (docs/protocol.md, "Capabilities"):
//! per `supports` entry, the scheme parameter values it accepts and the dtypes it
//! computes in. This module reads them (with errors that name the field), decides
//! whether a case is declared, and lists what a run never exercised.
//!
//! A parameter list holds *forms*: a JSON value (accepts exactly that value), a variant
//! name (accepts an object value whose only key is that name, e.g. `"fixed"` for
//! `{"fixed": 0.3}`), a range `{"min": a, "max": b}` (a number in `[a, b]`), or, for
//! `rotary_dim` only, `"full"` (equal to `head_dim`) and `"partial"` (smaller).

use std::collections::BTreeMap;

use serde_json::{Map, Value};

use crate::case::{Case, Operation, OperationKind};
use crate::kernel::{KernelInfo, Support};
use crate::math::precision::Dtype;
use crate::scheme::Scheme;

/// What values a scheme parameter takes (defined with the scheme's parameters).
pub use crate::scheme::ParameterKind as Kind;

/// The parameters of `scheme`, named as in the case's `scheme` object.
pub fn parameters(scheme: Scheme) -> impl Iterator<Item = (&'static str, Kind)> {
    scheme.parameters().iter().map(|p| (p.name, p.kind))
}

/// Whether `encode` depends on `parameter` (`scale` and `clamp_len` change scores only:
/// they neither restrict nor are exercised by an `encode` case).
fn affects_encode(scheme: Scheme, parameter: &str) -> bool {
    scheme
        .parameters()
        .iter()
        .find(|p| p.name == parameter)
        .is_none_or(|p| p.encode)
}

fn kind_of(scheme: Scheme, parameter: &str) -> Option<Kind> {
    parameters(scheme)
        .find(|(name, _)| *name == parameter)
        .map(|(_, kind)| kind)
}

fn quoted(names: &[&str]) -> String {
    names
        .iter()
        .map(|n| format!("\"{n}\""))
        .collect::<Vec<_>>()
        .join(", ")
}

/// The bounds of a range form, `(min, max)`, either of which may be absent.
type Bounds = (Option<f64>, Option<f64>);

/// `Some(Ok((min, max)))` when `form` is a range object, `Some(Err)` when it is an object
/// that tries to be one and is malformed, `None` otherwise.
fn as_range(form: &Value) -> Option<Result<Bounds, String>> {
    let object = form.as_object()?;
    if !object.keys().any(|k| k == "min" || k == "max") {
        return None;
    }
    Some(range_bounds(object))
}

fn range_bounds(object: &Map<String, Value>) -> Result<Bounds, String> {
    if let Some(other) = object.keys().find(|k| *k != "min" && *k != "max") {
        return Err(format!(
            "a range has only the keys \"min\" and \"max\", not \"{other}\""
        ));
    }
    let bound = |key: &str| match object.get(key) {
        None => Ok(None),
        Some(v) => v
            .as_f64()
            .filter(|x| x.is_finite())
            .map(Some)
            .ok_or_else(|| format!("range bound \"{key}\" must be a finite number, not {v}")),
    };
    let (min, max) = (bound("min")?, bound("max")?);
    if let (Some(lo), Some(hi)) = (min, max) {
        if lo > hi {
            return Err(format!("range min {lo} is above max {hi}"));
        }
    }
    Ok((min, max))
}

/// Checks that `form` is something a `kind` parameter can list.
fn check_form(kind: Kind, form: &Value) -> Result<(), String> {
    if let Some(range) = as_range(form) {
        return match kind {
            Kind::Number | Kind::OptionalInteger | Kind::RotaryDim => range.map(drop),
            _ => Err(format!("{form} is a range; this parameter is not a number")),
        };
    }
    let ok = match kind {
        Kind::Names(names) => {
            return match form.as_str() {
                Some(s) if names.contains(&s) => Ok(()),
                _ => Err(format!("{form} is not one of {}", quoted(names))),
            }
        }
        Kind::Bool => form.is_boolean(),
        Kind::Number => form.as_f64().is_some_and(f64::is_finite),
        Kind::OptionalInteger => form.is_null() || form.as_u64().is_some(),
        Kind::Scale => {
            matches!(form.as_str(), Some("inverse_sqrt_dim" | "fixed"))
                || (form.is_object()
                    && serde_json::from_value::<crate::attention::Scale>(form.clone()).is_ok())
        }
        Kind::Scaling => {
            matches!(
                form.as_str(),
                Some("none" | "linear_interpolation" | "ntk_aware")
            ) || (form.is_object()
                && serde_json::from_value::<crate::scheme::rotary::RotaryScaling>(form.clone())
                    .is_ok())
        }
        Kind::RotaryDim => {
            matches!(form.as_str(), Some("full" | "partial")) || form.as_u64().is_some()
        }
    };
    if ok {
        Ok(())
    } else {
        Err(format!("{form} is not {}", describe(kind)))
    }
}

fn describe(kind: Kind) -> String {
    match kind {
        Kind::Names(names) => format!("one of {}", quoted(names)),
        Kind::Bool => "true or false".into(),
        Kind::Number => "a number or a range {\"min\", \"max\"}".into(),
        Kind::OptionalInteger => "null, a non-negative integer or a range {\"min\", \"max\"}".into(),
        Kind::Scale => "\"inverse_sqrt_dim\", \"fixed\" or a value such as {\"fixed\": 1.0}".into(),
        Kind::Scaling => "\"none\", \"linear_interpolation\", \"ntk_aware\" or a value such as {\"ntk_aware\": {\"factor\": 8.0}}".into(),
        Kind::RotaryDim => "\"full\", \"partial\", an integer or a range {\"min\", \"max\"}".into(),
    }
}

/// JSON equality with numbers compared as numbers (`10000` equals `10000.0`).
fn same(a: &Value, b: &Value) -> bool {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => x.as_f64() == y.as_f64(),
        (Value::Array(x), Value::Array(y)) => {
            x.len() == y.len() && x.iter().zip(y).all(|(p, q)| same(p, q))
        }
        (Value::Object(x), Value::Object(y)) => {
            x.len() == y.len() && x.iter().all(|(k, p)| y.get(k).is_some_and(|q| same(p, q)))
        }
        _ => a == b,
    }
}

/// Whether `form` accepts the parameter value `value` of a case with head width `head_dim`.
fn accepts(kind: Kind, form: &Value, value: &Value, head_dim: usize) -> bool {
    if let Some(range) = as_range(form) {
        let Ok((min, max)) = range else { return false };
        return value
            .as_f64()
            .is_some_and(|x| min.is_none_or(|lo| x >= lo) && max.is_none_or(|hi| x <= hi));
    }
    if kind == Kind::RotaryDim {
        match form.as_str() {
            Some("full") => return value.as_u64() == Some(head_dim as u64),
            Some("partial") => return value.as_u64().is_some_and(|r| r < head_dim as u64),
            _ => {}
        }
    }
    if same(form, value) {
        return true;
    }
    match (form.as_str(), value.as_object()) {
        (Some(name), Some(object)) => object.len() == 1 && object.contains_key(name),
        _ => false,
    }
}

/// The value of every parameter of the case's scheme, as in the case JSON.
fn parameter_values(case: &Case) -> Map<String, Value> {
    match serde_json::to_value(&case.scheme) {
        Ok(Value::Object(object)) => object,
        _ => Map::new(),
    }
}

fn operation_is(support: &Support, operation: OperationKind) -> bool {
    support.operations.contains(&operation)
}

impl Support {
    /// An entry for `scheme` and `operations` that accepts every parameter value and
    /// computes in the kernel's top-level dtypes.
    pub fn new(scheme: Scheme, operations: &[OperationKind]) -> Self {
        Support {
            scheme,
            operations: operations.to_vec(),
            parameters: BTreeMap::new(),
            dtypes: Vec::new(),
        }
    }

    /// Narrows `parameter` to the listed forms (docs/protocol.md, "Capabilities").
    pub fn with_parameter(mut self, parameter: &str, forms: Vec<Value>) -> Self {
        self.parameters.insert(parameter.to_string(), forms);
        self
    }

    /// Computes this entry's operations in `dtypes` (preferred first) instead of the
    /// kernel's top-level dtypes.
    pub fn with_dtypes(mut self, dtypes: &[Dtype]) -> Self {
        self.dtypes = dtypes.to_vec();
        self
    }

    /// Whether this entry accepts `case`; otherwise why not, in words.
    pub fn accepts(&self, case: &Case) -> Result<(), String> {
        let scheme = case.scheme.scheme();
        if self.scheme != scheme {
            return Err(format!("the kernel does not implement {}", scheme.name()));
        }
        if !operation_is(self, case.operation.kind()) {
            return Err(format!(
                "the kernel does not list {} {}",
                scheme.name(),
                case.operation.name()
            ));
        }
        let values = parameter_values(case);
        for (name, forms) in &self.parameters {
            if case.operation == Operation::Encode && !affects_encode(scheme, name) {
                continue;
            }
            let value = values.get(name).unwrap_or(&Value::Null);
            // A name the scheme does not have (the handshake parser refuses one; only a
            // Rust kernel building its entry by hand can pass it) has the value null.
            let kind = kind_of(scheme, name).unwrap_or(Kind::Number);
            if !forms.iter().any(|f| accepts(kind, f, value, case.head_dim)) {
                // Variants read better by name (and group in the report): `"fixed"`
                // rather than `{"fixed":0.3}`.
                let shown = match kind {
                    Kind::Scale | Kind::Scaling => category_of(kind, value, case.head_dim)
                        .map(|c| show(kind, c))
                        .unwrap_or_else(|| value.to_string()),
                    _ => value.to_string(),
                };
                return Err(format!(
                    "not declared: {} {name} {shown} (the kernel declares {})",
                    scheme.name(),
                    forms
                        .iter()
                        .map(Value::to_string)
                        .collect::<Vec<_>>()
                        .join(", ")
                ));
            }
        }
        Ok(())
    }
}

impl KernelInfo {
    /// Whether the kernel declares `case` (some `supports` entry accepts it); otherwise
    /// the reason of the entry that came closest.
    pub fn declares(&self, case: &Case) -> Result<(), String> {
        let scheme = case.scheme.scheme();
        let operation = case.operation.kind();
        let mut reason = format!("the kernel does not implement {}", scheme.name());
        // 0: no entry for the scheme; 1: the scheme but not the operation; 2: both, a
        // parameter value not declared (the most specific reason wins).
        let mut closest = 0;
        for support in &self.supports {
            match support.accepts(case) {
                Ok(()) => return Ok(()),
                Err(why) => {
                    let rank = match (support.scheme == scheme, operation_is(support, operation)) {
                        (false, _) => 0,
                        (true, false) => 1,
                        (true, true) => 2,
                    };
                    if rank > closest {
                        closest = rank;
                        reason = why;
                    }
                }
            }
        }
        Err(reason)
    }

    /// The dtypes the kernel computes `case` in, preferred first: the dtypes of every
    /// entry that accepts it (the top-level list for an entry without its own). Empty
    /// when the case is not declared.
    pub fn dtypes_for(&self, case: &Case) -> Vec<Dtype> {
        let mut out: Vec<Dtype> = Vec::new();
        for support in self.supports.iter().filter(|s| s.accepts(case).is_ok()) {
            for d in self.entry_dtypes(support) {
                if !out.contains(d) {
                    out.push(*d);
                }
            }
        }
        out
    }

    /// The dtypes of the entries that list `scheme` with `operation`, preferred first.
    pub fn operation_dtypes(&self, scheme: Scheme, operation: OperationKind) -> Vec<Dtype> {
        let mut out: Vec<Dtype> = Vec::new();
        for support in self
            .supports
            .iter()
            .filter(|s| s.scheme == scheme && operation_is(s, operation))
        {
            for d in self.entry_dtypes(support) {
                if !out.contains(d) {
                    out.push(*d);
                }
            }
        }
        out
    }

    fn entry_dtypes<'a>(&'a self, support: &'a Support) -> &'a [Dtype] {
        if support.dtypes.is_empty() {
            &self.dtypes
        } else {
            &support.dtypes
        }
    }
}

/// Reads the handshake's `supports` list, naming the field of any problem
/// (`supports[1].parameters.pairing[0]: …`).
pub fn parse_supports(value: Option<&Value>) -> Result<Vec<Support>, String> {
    let list = value
        .and_then(Value::as_array)
        .ok_or("`supports` must be a list of {scheme, operations} entries")?;
    list.iter()
        .enumerate()
        .map(|(n, entry)| parse_entry(entry, &format!("supports[{n}]")))
        .collect()
}

fn parse_entry(entry: &Value, at: &str) -> Result<Support, String> {
    let object = entry
        .as_object()
        .ok_or_else(|| format!("{at} must be an object {{scheme, operations}}"))?;
    let scheme: Scheme = match object.get("scheme") {
        None => return Err(format!("{at}.scheme is missing")),
        Some(v) => serde_json::from_value(v.clone()).map_err(|_| {
            format!(
                "{at}.scheme: {v} is not one of {}",
                quoted(&Scheme::ALL.iter().map(|s| s.name()).collect::<Vec<_>>())
            )
        })?,
    };
    let operations = match object.get("operations").and_then(Value::as_array) {
        None => return Err(format!("{at}.operations must be a list of operation names")),
        Some(list) => {
            let mut operations = Vec::new();
            for (i, o) in list.iter().enumerate() {
                let name = o
                    .as_str()
                    .ok_or_else(|| format!("{at}.operations[{i}]: {o} is not a string"))?;
                // Names of operations this build does not know are ignored (a newer
                // kernel may list more).
                if let Ok(kind) = name.parse::<OperationKind>() {
                    if !operations.contains(&kind) {
                        operations.push(kind);
                    }
                }
            }
            operations
        }
    };
    let mut support = Support {
        scheme,
        operations,
        parameters: BTreeMap::new(),
        dtypes: Vec::new(),
    };
    match object.get("parameters") {
        None | Some(Value::Null) => {}
        Some(Value::Object(parameters)) => {
            for (name, forms) in parameters {
                let here = format!("{at}.parameters.{name}");
                let kind = kind_of(scheme, name).ok_or_else(|| {
                    format!(
                        "{here}: {} has no parameter \"{name}\"; its parameters are {}",
                        scheme.name(),
                        quoted(
                            &parameters_of(scheme)
                                .iter()
                                .map(String::as_str)
                                .collect::<Vec<_>>()
                        )
                    )
                })?;
                let list = forms
                    .as_array()
                    .ok_or_else(|| format!("{here} must be a list of accepted values"))?;
                if list.is_empty() {
                    return Err(format!(
                        "{here} is empty: it would accept no value (leave the parameter out to accept every value)"
                    ));
                }
                for (i, form) in list.iter().enumerate() {
                    check_form(kind, form).map_err(|e| format!("{here}[{i}]: {e}"))?;
                }
                support.parameters.insert(name.clone(), list.clone());
            }
        }
        Some(other) => {
            return Err(format!(
                "{at}.parameters must be an object of parameter lists, not {other}"
            ))
        }
    }
    match object.get("dtypes") {
        None | Some(Value::Null) => {}
        Some(v) => {
            let list = v
                .as_array()
                .ok_or_else(|| format!("{at}.dtypes must be a list of dtype names"))?;
            if list.is_empty() {
                return Err(format!(
                    "{at}.dtypes is empty (leave it out to use the top-level dtypes)"
                ));
            }
            for (i, d) in list.iter().enumerate() {
                let dtype: Dtype = d
                    .as_str()
                    .and_then(|s| s.parse().ok())
                    .filter(|d: &Dtype| d.is_float())
                    .ok_or_else(|| {
                        format!("{at}.dtypes[{i}]: {d} is not one of \"f64\", \"f32\", \"f16\", \"bf16\"")
                    })?;
                support.dtypes.push(dtype);
            }
        }
    }
    Ok(support)
}

fn parameters_of(scheme: Scheme) -> Vec<String> {
    parameters(scheme).map(|(n, _)| n.to_string()).collect()
}

/// The coverage categories of a parameter: the values whose difference matters to a
/// kernel (none for plain numbers).
fn categories(kind: Kind) -> &'static [&'static str] {
    match kind {
        Kind::Names(names) => names,
        Kind::Bool => &["true", "false"],
        Kind::OptionalInteger => &["null", "integer"],
        Kind::Scale => &["inverse_sqrt_dim", "fixed"],
        Kind::Scaling => &["none", "linear_interpolation", "ntk_aware"],
        Kind::RotaryDim => &["full", "partial"],
        Kind::Number => &[],
    }
}

fn category_of(kind: Kind, value: &Value, head_dim: usize) -> Option<&'static str> {
    categories(kind).iter().copied().find(|&c| match kind {
        Kind::Bool => value.as_bool().is_some_and(|b| b.to_string() == c),
        Kind::OptionalInteger => (c == "null") == value.is_null(),
        Kind::RotaryDim => {
            let full = value.as_u64() == Some(head_dim as u64);
            (c == "full") == full
        }
        _ => value.as_str() == Some(c) || value.as_object().is_some_and(|o| o.contains_key(c)),
    })
}

/// Whether `form` accepts at least some value of `category`.
fn covers(kind: Kind, form: &Value, category: &str) -> bool {
    let numeric = form.is_number() || as_range(form).is_some();
    match kind {
        Kind::Bool => form.as_bool().is_some_and(|b| b.to_string() == category),
        Kind::OptionalInteger => {
            if category == "null" {
                form.is_null()
            } else {
                numeric
            }
        }
        Kind::RotaryDim => numeric || form.as_str() == Some(category),
        _ => {
            form.as_str() == Some(category)
                || form.as_object().is_some_and(|o| o.contains_key(category))
        }
    }
}

fn show(kind: Kind, category: &str) -> String {
    match kind {
        Kind::Bool | Kind::OptionalInteger => category.to_string(),
        _ => format!("\"{category}\""),
    }
}

/// Something no compared case covered.
#[derive(Debug, Clone, PartialEq, Eq, serde::Serialize)]
pub struct Gap {
    /// What it is: `rotary pairing "adjacent"`, `rotary decode`, `rotary attention in f16`,
    /// `dtype bf16`, `alibi`.
    pub what: String,
    /// Whether the kernel declared it (so the run could have covered it).
    pub declared: bool,
}

/// What the kernel's answers never covered in a run: schemes, operations, parameter
/// values and dtypes no compared case exercised. `exercised` holds every case whose
/// outputs were compared, with the dtype it was sent in.
pub fn never_exercised(info: &KernelInfo, exercised: &[(Case, Dtype)]) -> Vec<Gap> {
    let mut gaps = Vec::new();
    let mut gap = |what: String, declared: bool| gaps.push(Gap { what, declared });
    for &scheme in Scheme::ALL {
        let entries: Vec<&Support> = info
            .supports
            .iter()
            .filter(|s| s.scheme == scheme)
            .collect();
        if entries.is_empty() {
            gap(scheme.name().to_string(), false);
            continue;
        }
        let ran: Vec<&(Case, Dtype)> = exercised
            .iter()
            .filter(|(c, _)| c.scheme.scheme() == scheme)
            .collect();
        if ran.is_empty() {
            // Nothing of the scheme ran: its operations and values need no listing.
            gap(scheme.name().to_string(), true);
            continue;
        }
        for operation in OperationKind::ALL {
            let what = format!("{} {operation}", scheme.name());
            if !entries.iter().any(|s| operation_is(s, operation)) {
                gap(what, false);
                continue;
            }
            let ran_here: Vec<&&(Case, Dtype)> = ran
                .iter()
                .filter(|(c, _)| c.operation.kind() == operation)
                .collect();
            if ran_here.is_empty() {
                gap(what, true);
                continue;
            }
            for dtype in info.operation_dtypes(scheme, operation) {
                if !ran_here.iter().any(|(_, d)| *d == dtype) {
                    gap(format!("{what} in {dtype}"), true);
                }
            }
        }
        let attends = entries
            .iter()
            .any(|s| s.operations.iter().any(|&o| o != OperationKind::Encode));
        for (name, kind) in parameters(scheme) {
            let scores_only = !affects_encode(scheme, name);
            if scores_only && !attends {
                continue;
            }
            for &category in categories(kind) {
                let declared = entries.iter().any(|s| {
                    s.parameters
                        .get(name)
                        .is_none_or(|forms| forms.iter().any(|f| covers(kind, f, category)))
                });
                let covered = ran.iter().any(|(c, _)| {
                    if scores_only && c.operation == Operation::Encode {
                        return false;
                    }
                    let values = parameter_values(c);
                    let value = values.get(name).unwrap_or(&Value::Null);
                    category_of(kind, value, c.head_dim) == Some(category)
                });
                if !covered {
                    gap(
                        format!("{} {name} {}", scheme.name(), show(kind, category)),
                        declared,
                    );
                }
            }
        }
    }
    for dtype in [Dtype::F64, Dtype::F32, Dtype::F16, Dtype::Bf16] {
        let declared =
            info.dtypes.contains(&dtype) || info.supports.iter().any(|s| s.dtypes.contains(&dtype));
        if !declared {
            gap(format!("dtype {dtype}"), false);
        }
    }
    gaps
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn every_form_kind_accepts_what_the_protocol_page_says() {
        let names = Kind::Names(&["adjacent", "half_split"]);
        assert!(accepts(
            names,
            &json!("half_split"),
            &json!("half_split"),
            64
        ));
        assert!(!accepts(
            names,
            &json!("half_split"),
            &json!("adjacent"),
            64
        ));
        assert!(accepts(Kind::Number, &json!(10000), &json!(10000.0), 64));
        assert!(accepts(Kind::Number, &json!({"max": 16}), &json!(16), 64));
        assert!(!accepts(Kind::Number, &json!({"max": 16}), &json!(17), 64));
        assert!(accepts(
            Kind::OptionalInteger,
            &json!(null),
            &json!(null),
            64
        ));
        assert!(!accepts(Kind::OptionalInteger, &json!(null), &json!(5), 64));
        assert!(accepts(
            Kind::OptionalInteger,
            &json!({"min": 0}),
            &json!(5),
            64
        ));
        assert!(!accepts(
            Kind::OptionalInteger,
            &json!({"min": 0}),
            &json!(null),
            64
        ));
        assert!(accepts(
            Kind::Scale,
            &json!("fixed"),
            &json!({"fixed": 0.3}),
            64
        ));
        assert!(!accepts(
            Kind::Scale,
            &json!("fixed"),
            &json!("inverse_sqrt_dim"),
            64
        ));
        assert!(accepts(
            Kind::Scale,
            &json!({"fixed": 1}),
            &json!({"fixed": 1.0}),
            64
        ));
        assert!(!accepts(
            Kind::Scale,
            &json!({"fixed": 1}),
            &json!({"fixed": 0.5}),
            64
        ));
        let ntk = json!({"ntk_aware": {"factor": 8.0}});
        assert!(accepts(Kind::Scaling, &json!("ntk_aware"), &ntk, 64));
        assert!(!accepts(
            Kind::Scaling,
            &json!("linear_interpolation"),
            &ntk,
            64
        ));
        assert!(accepts(Kind::Scaling, &json!("none"), &json!("none"), 64));
        assert!(accepts(Kind::RotaryDim, &json!("full"), &json!(64), 64));
        assert!(!accepts(Kind::RotaryDim, &json!("full"), &json!(32), 64));
        assert!(accepts(Kind::RotaryDim, &json!("partial"), &json!(32), 64));
        assert!(!accepts(Kind::RotaryDim, &json!("partial"), &json!(64), 64));
    }

    #[test]
    fn forms_a_parameter_cannot_take_are_refused() {
        let pairing = Kind::Names(&["adjacent", "half_split"]);
        assert!(check_form(pairing, &json!("half-split")).is_err());
        assert!(check_form(Kind::Bool, &json!("true")).is_err());
        assert!(check_form(Kind::Number, &json!({"min": 3, "max": 1})).is_err());
        assert!(check_form(Kind::Number, &json!({"min": 1, "top": 3})).is_err());
        assert!(check_form(Kind::Scale, &json!({"fixed": "big"})).is_err());
        assert!(check_form(Kind::Scale, &json!({"min": 1})).is_err());
        assert!(check_form(Kind::Scaling, &json!("yarn")).is_err());
        assert!(check_form(Kind::OptionalInteger, &json!(-1)).is_err());
        assert!(check_form(Kind::RotaryDim, &json!("half")).is_err());
        for (kind, ok) in [
            (Kind::Scale, json!({"fixed": 0.25})),
            (
                Kind::Scaling,
                json!({"linear_interpolation": {"factor": 4.0}}),
            ),
            (Kind::OptionalInteger, json!({"min": 0})),
            (Kind::RotaryDim, json!("partial")),
        ] {
            assert_eq!(check_form(kind, &ok), Ok(()), "{ok}");
        }
    }
}
