//! The resampling options: each one explicit, with the meaning the ONNX Resize operator
//! (opset 19) gives it where the operator defines one.

use std::fmt;
use std::str::FromStr;

use serde::Serialize;

/// The interpolation kernel.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Kernel {
    /// Nearest source sample (ONNX mode `nearest`, nearest_mode `round_prefer_floor`).
    Nearest,
    /// Linear in each axis (ONNX mode `linear`).
    Bilinear,
    /// Keys cubic in each axis with parameter a (ONNX mode `cubic`).
    #[default]
    Bicubic,
    /// Three-lobe Lanczos, weights normalised to sum to 1.
    Lanczos3,
    /// Box average over each output cell's footprint (for shrinking).
    Area,
}

/// How an output coordinate maps back to a source coordinate.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "kebab-case")]
pub enum Coords {
    /// `x_src = (x_out + 0.5) / scale - 0.5` (ONNX `half_pixel`).
    #[default]
    HalfPixel,
    /// `x_src = x_out · (in - 1) / (out - 1)` (ONNX `align_corners`).
    AlignCorners,
}

/// What happens to kernel taps that fall outside the source grid.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Edges {
    /// Out-of-range taps take the border value (ONNX edge padding, `exclude_outside = 0`).
    #[default]
    Clamp,
    /// Out-of-range taps are dropped and the rest rescaled to sum to 1 (`exclude_outside = 1`).
    Renormalize,
}

/// Whether the kernel is stretched by the shrink factor on a shrinking axis.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum Antialias {
    Off,
    On,
    /// On for an axis that shrinks, off for one that grows or stays.
    #[default]
    Auto,
}

/// All options of one resampling.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Options {
    pub kernel: Kernel,
    pub coords: Coords,
    pub edges: Edges,
    pub antialias: Antialias,
    /// The cubic parameter a (ONNX `cubic_coeff_a`); used by `bicubic` only.
    pub cubic_a: f64,
}

/// The ONNX default for `cubic_coeff_a` and the usual tensor-framework bicubic.
pub const DEFAULT_CUBIC_A: f64 = -0.75;

impl Default for Options {
    fn default() -> Self {
        Options {
            kernel: Kernel::default(),
            coords: Coords::default(),
            edges: Edges::default(),
            antialias: Antialias::default(),
            cubic_a: DEFAULT_CUBIC_A,
        }
    }
}

impl Options {
    /// Whether antialiasing applies to an axis going from `input` to `output` samples.
    pub fn antialias_applies(&self, input: usize, output: usize) -> bool {
        self.antialias_applies_when(output < input)
    }

    /// Whether antialiasing applies to an axis that shrinks (`out < in`, or a scale below 1)
    /// or not.
    pub fn antialias_applies_when(&self, shrinks: bool) -> bool {
        match self.antialias {
            Antialias::Off => false,
            Antialias::On => true,
            Antialias::Auto => shrinks,
        }
    }
}

macro_rules! text_enum {
    ($t:ty, $($variant:ident => $text:literal),+ $(,)?) => {
        impl $t {
            /// The spelling used on the command line and in reports.
            pub fn as_str(self) -> &'static str {
                match self { $(<$t>::$variant => $text),+ }
            }
            /// Every value, in documentation order.
            pub const ALL: &'static [$t] = &[$(<$t>::$variant),+];
        }
        impl fmt::Display for $t {
            fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str(self.as_str())
            }
        }
        impl FromStr for $t {
            type Err = String;
            fn from_str(s: &str) -> Result<Self, String> {
                match s {
                    $($text => Ok(<$t>::$variant),)+
                    _ => Err(format!(
                        "unknown value \"{s}\"; expected one of: {}",
                        [$($text),+].join(", ")
                    )),
                }
            }
        }
    };
}

text_enum!(Kernel, Nearest => "nearest", Bilinear => "bilinear", Bicubic => "bicubic",
    Lanczos3 => "lanczos3", Area => "area");
text_enum!(Coords, HalfPixel => "half-pixel", AlignCorners => "align-corners");
text_enum!(Edges, Clamp => "clamp", Renormalize => "renormalize");
text_enum!(Antialias, Off => "off", On => "on", Auto => "auto");
