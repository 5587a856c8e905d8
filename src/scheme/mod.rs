//! Positional schemes: one module per scheme, pure functions, no I/O.
//!
//! Every module states its index convention and cites its paper; the shared
//! conventions (layout, positions, distance, causal visibility) live in
//! [`crate::attention`] and docs/conventions.md.

pub mod alibi;
pub mod bucketed;
pub mod clipped;
pub mod learned;
pub mod rotary;
pub mod sinusoidal;
pub mod xl_relative;

/// The positional schemes the reference implements.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Scheme {
    /// Absolute sinusoidal encoding added to the token embeddings.
    Sinusoidal,
    /// Learned absolute position table.
    Learned,
    /// Transformer-XL relative scoring with u, v biases and memory.
    XlRelative,
    /// Rotary position embedding (RoPE) applied to queries and keys.
    Rotary,
    /// Attention with linear biases (ALiBi).
    Alibi,
    /// Bucketed relative bias (T5).
    Bucketed,
    /// Clipped relative position representations (Shaw et al.).
    Clipped,
}

impl Scheme {
    /// Every scheme, in a stable order.
    pub const ALL: &'static [Scheme] = &[
        Scheme::Sinusoidal,
        Scheme::Learned,
        Scheme::XlRelative,
        Scheme::Rotary,
        Scheme::Alibi,
        Scheme::Bucketed,
        Scheme::Clipped,
    ];

    /// The scheme's name as used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            Scheme::Sinusoidal => "sinusoidal",
            Scheme::Learned => "learned",
            Scheme::XlRelative => "xl_relative",
            Scheme::Rotary => "rotary",
            Scheme::Alibi => "alibi",
            Scheme::Bucketed => "bucketed",
            Scheme::Clipped => "clipped",
        }
    }

    /// The published source of the scheme.
    pub fn source(self) -> &'static str {
        match self {
            Scheme::Sinusoidal => "Vaswani et al. 2017, Attention Is All You Need, §3.5",
            Scheme::Learned => "learned absolute table (common practice)",
            Scheme::XlRelative => "Dai et al. 2019, Transformer-XL, §3.2-3.3",
            Scheme::Rotary => "Su et al. 2021, RoFormer, eqs. 14-16 and 34",
            Scheme::Alibi => "Press, Smith, Lewis 2022, Train Short, Test Long (ALiBi), §3",
            Scheme::Bucketed => "Raffel et al. 2020, T5, §2.1",
            Scheme::Clipped => "Shaw, Uszkoreit, Vaswani 2018, eqs. 3-5",
        }
    }
}
