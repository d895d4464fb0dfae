//! posgrid: find the position tables of vision-transformer checkpoints and resample them to a
//! new patch grid, offline and exactly, writing a patched checkpoint safely.
//!
//! Data flows one way: [`checkpoint`] (read and validate) → [`kinds`] (find every grid-dependent tensor, one module per kind) →
//! [`plan`] (what changes) → [`resample`] (the maths) → [`write`] (stream and rename), with
//! [`resize`] running the whole job and [`report`] rendering results for people and scripts.
//!
//! The engine on its own, on a `[H, W, D]` table held row-major:
//!
//! ```
//! use posgrid::resample::{resample, Options};
//!
//! // A 2x2 grid of 1-wide rows, enlarged to 4x4 with the defaults (bicubic, half-pixel).
//! let table = [1.0f32, 2.0, 3.0, 4.0];
//! let out = resample(&table, (2, 2), 1, (4, 4), &Options::default()).unwrap();
//! assert_eq!(out.len(), 16);
//! // Resampling to the same grid is an exact copy.
//! assert_eq!(resample(&table, (2, 2), 1, (2, 2), &Options::default()).unwrap(), table);
//! ```
//!
//! The whole job, as the `resize` command runs it, is [`resize::run`].

pub mod checkpoint;
pub mod cli;
pub mod config;
pub mod config_files;
pub mod error;
pub mod figure;
pub mod kinds;
pub mod plan;
pub mod rebuild;
pub mod render;
pub mod report;
pub mod resample;
pub mod resize;
pub mod selection;
pub mod similarity;
pub mod sincos;
pub mod values;
pub mod visible;
pub mod write;

pub use error::{Error, Result};

/// The crate's version; the Python package carries the same one.
pub const VERSION: &str = env!("CARGO_PKG_VERSION");
