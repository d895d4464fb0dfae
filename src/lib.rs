//! posgrid: find the position tables of vision-transformer checkpoints and resample them to a
//! new patch grid, offline and exactly, writing a patched checkpoint safely.
//!
//! Data flows one way: [`checkpoint`] (read and validate) → [`discover`] (find tables) →
//! [`plan`] (what changes) → [`resample`] (the maths) → [`write`] (stream and rename) →
//! [`report`] (JSON and text).

pub mod checkpoint;
pub mod discover;
pub mod error;
pub mod resample;
pub mod sincos;
pub mod values;

pub use error::{Error, Result};
