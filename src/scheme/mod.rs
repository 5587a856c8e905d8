//! Positional schemes: one module per scheme, each holding its formulas (pure functions,
//! no I/O, conventions stated and the paper cited), its case parameters, the arrays its
//! cases need, its reference per operation, its error bounds and its random parameters
//! (the [`SchemeModel`] and [`SchemeKind`] traits of [`model`]).
//!
//! The shared conventions (layout, positions, distance, causal visibility) live in
//! [`crate::attention`] and docs/conventions.md.
//!
//! # Adding a scheme
//!
//! Write `src/scheme/<name>.rs` with the formulas and a `<Name>Spec` parameter struct
//! implementing [`SchemeModel`] and [`SchemeKind`] (`learned.rs` is the smallest worked
//! example), then add one line to the registry below. The suite, the checker, the
//! comparison, the capabilities and the reports need no change.

pub mod absolute;
pub mod alibi;
pub mod bucketed;
pub mod clipped;
pub mod learned;
pub mod model;
pub mod rotary;
pub mod sinusoidal;
pub mod xl_relative;

pub use model::{Inputs, Parameter, ParameterKind, SchemeKind, SchemeModel};

use crate::math::Stream;
use crate::shape::Shape;

/// The registry: one line per scheme (its doc, its variant, its parameter struct and
/// its name in files). Generates [`Scheme`], [`SchemeSpec`] and their dispatch.
macro_rules! registry {
    ($($(#[doc = $doc:literal])* $variant:ident($spec:ty) = $name:literal,)*) => {
        /// The positional schemes the reference implements.
        #[derive(
            Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord,
            serde::Serialize, serde::Deserialize,
        )]
        pub enum Scheme {
            $($(#[doc = $doc])* #[serde(rename = $name)] $variant,)*
        }

        /// A scheme with its parameters, as the `scheme` object of a case
        /// (`{"name": "<scheme>", <parameters>}`; docs/conventions.md).
        #[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
        #[serde(tag = "name")]
        pub enum SchemeSpec {
            $($(#[doc = $doc])* #[serde(rename = $name)] $variant($spec),)*
        }

        impl Scheme {
            /// Every scheme, in a stable order.
            pub const ALL: &'static [Scheme] = &[$(Scheme::$variant,)*];

            /// The scheme's name as used on the command line and in files.
            pub fn name(self) -> &'static str {
                match self { $(Scheme::$variant => $name,)* }
            }

            /// The published source of the scheme.
            pub fn source(self) -> &'static str {
                match self { $(Scheme::$variant => <$spec as SchemeKind>::SOURCE,)* }
            }

            /// The parameters a kernel may declare, named as in the case's `scheme`
            /// object.
            pub fn parameters(self) -> &'static [Parameter] {
                match self { $(Scheme::$variant => <$spec as SchemeKind>::PARAMETERS,)* }
            }

            /// The most heads a random case of this scheme draws.
            pub fn max_random_heads(self) -> usize {
                match self { $(Scheme::$variant => <$spec as SchemeKind>::MAX_RANDOM_HEADS,)* }
            }

            /// The largest start position `p0` a random case of this scheme draws.
            pub fn max_random_start(self) -> usize {
                match self { $(Scheme::$variant => <$spec as SchemeKind>::MAX_RANDOM_START,)* }
            }

            /// Random parameters for a random case of `shape`.
            pub fn random_spec(self, stream: &mut Stream, shape: &Shape<'_>) -> SchemeSpec {
                match self {
                    $(Scheme::$variant => SchemeSpec::$variant(<$spec as SchemeKind>::random(stream, shape)),)*
                }
            }
        }

        impl SchemeSpec {
            /// The scheme these parameters belong to.
            pub fn scheme(&self) -> Scheme {
                match self { $(SchemeSpec::$variant(_) => Scheme::$variant,)* }
            }

            /// What the scheme contributes, with these parameters.
            pub fn model(&self) -> &dyn SchemeModel {
                match self { $(SchemeSpec::$variant(spec) => spec,)* }
            }
        }
    };
}

registry! {
    /// Absolute sinusoid added to queries and keys (Vaswani et al. 2017, §3.5).
    Sinusoidal(sinusoidal::SinusoidalSpec) = "sinusoidal",
    /// Learned absolute table added to queries and keys.
    Learned(learned::LearnedSpec) = "learned",
    /// Transformer-XL relative scoring with u, v biases and memory (Dai et al. 2019).
    XlRelative(xl_relative::XlRelativeSpec) = "xl_relative",
    /// Rotary position embedding, RoPE (Su et al. 2021).
    Rotary(rotary::RotarySpec) = "rotary",
    /// Attention with linear biases, ALiBi (Press et al. 2022).
    Alibi(alibi::AlibiSpec) = "alibi",
    /// Bucketed relative bias (Raffel et al. 2020, T5).
    Bucketed(bucketed::BucketedSpec) = "bucketed",
    /// Clipped relative position representations (Shaw et al. 2018).
    Clipped(clipped::ClippedSpec) = "clipped",
}

impl SchemeSpec {
    /// The score scale the scheme uses.
    pub fn scale(&self) -> crate::attention::Scale {
        self.model().scale()
    }
}

impl std::fmt::Display for Scheme {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

impl std::str::FromStr for Scheme {
    type Err = crate::Error;

    fn from_str(s: &str) -> crate::Result<Self> {
        Scheme::ALL
            .iter()
            .copied()
            .find(|x| x.name() == s)
            .ok_or_else(|| {
                let names: Vec<&str> = Scheme::ALL.iter().map(|x| x.name()).collect();
                crate::Error::param("scheme", format!("one of {}", names.join(", ")), s)
            })
    }
}
