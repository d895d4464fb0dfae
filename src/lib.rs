//! posgrid: find the position tables of vision-transformer checkpoints and resample them to a
//! new patch grid, offline and exactly, writing a patched checkpoint safely.
//!
//! Data flows one way: [`checkpoint`] (read and validate) → [`discover`] (find tables) →
//! [`plan`] (what changes) → [`resample`] (the maths) → [`write`] (stream and rename), with
//! [`resize`] running the whole job and [`report`] rendering results for people and scripts.

pub mod checkpoint;
pub mod cli;
pub mod discover;
pub mod error;
pub mod figure;
pub mod output;
pub mod plan;
pub mod render;
pub mod report;
pub mod resample;
pub mod resize;
pub mod similarity;
pub mod sincos;
pub mod values;
pub mod write;

pub use error::{Error, Result};
