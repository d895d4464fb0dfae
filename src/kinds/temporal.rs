//! Temporal position tables of video models (kind `temporal`): `[1, T, D]` (or `[T, D]`), one
//! row per frame (or tubelet along time), kept apart from the spatial table. They follow the
//! frame count (`--frames`, or the T of `--grid TxHxW`) and are resampled in 1-D with the
//! kernel options, like the axes of any other grid.

use serde::Serialize;

use super::names::normalized;
use super::{serialize_dtype, Change, ChangeReport, Computed};
use super::{Discovery, Encoding, Kind, Skipped};
use crate::checkpoint::{Dtype, TensorSource};
use crate::error::{Error, Result};
use crate::plan::Request;
use crate::resample::{self, Options};
use crate::values;

/// A temporal table.
#[derive(Debug, Clone, Serialize)]
pub struct TemporalTable {
    pub name: String,
    pub kind: Kind,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub frames: usize,
    pub dim: usize,
    /// Input frames per position along time (a 5-D patch kernel's t; 1 without one).
    pub tubelet: usize,
}

/// Names of temporal tables in released video checkpoints (common practice): `time_embed`,
/// `temporal_pos_embed`, `temporal_embedding`, `time_pos_embed`.
pub(crate) fn is_temporal_name(name: &str) -> bool {
    let n = normalized(name);
    ["timeemb", "temporalemb", "temporalposemb", "timeposemb"]
        .iter()
        .any(|k| n.contains(k))
}

pub(super) fn find(source: &dyn TensorSource, found: &mut Discovery) -> Result<()> {
    let tubelet = super::absolute::tubelet_kernels(source.entries())
        .first()
        .map_or(1, |k| k.frames);
    for entry in source.entries() {
        if !is_temporal_name(&entry.name) {
            continue;
        }
        let (frames, dim) = match entry.shape[..] {
            [1, t, d] | [t, d] if t >= 1 && d >= 1 && values::is_float(entry.dtype) => (t, d),
            _ => {
                found.skipped.push(Skipped {
                    name: entry.name.clone(),
                    reason: format!(
                        "shape {:?} ({}) is not a float [1, T, D] temporal table",
                        entry.shape, entry.dtype
                    ),
                });
                continue;
            }
        };
        found.encodings.push(Encoding::Temporal(TemporalTable {
            name: entry.name.clone(),
            kind: Kind::Temporal,
            dtype: entry.dtype,
            shape: entry.shape.clone(),
            frames,
            dim,
            tubelet,
        }));
    }
    Ok(())
}

/// One temporal table to resample.
#[derive(Debug, Clone, Serialize)]
pub struct TemporalChange {
    #[serde(flatten)]
    pub table: TemporalTable,
    pub to: usize,
    pub new_shape: Vec<usize>,
    pub options: Options,
    pub antialias_applied: bool,
}

/// Plan the change: `None` unless the frame count changes.
pub fn plan(
    ckpt: &dyn TensorSource,
    t: &TemporalTable,
    request: &Request,
) -> Result<Option<TemporalChange>> {
    let path = ckpt.source_path();
    let Some(frames) = request.frames else {
        return Ok(None);
    };
    let to = frames.positions(&t.name, t.tubelet)?;
    if to == t.frames {
        return Ok(None);
    }
    resample::validate((t.frames, 1), (to, 1), &request.options)
        .map_err(|e| Error::usage_in(path, format!("{}: {e}", t.name)))?;
    let needed = (to as u64).saturating_mul(t.dim as u64).saturating_mul(32);
    crate::kinds::within_guard(
        path,
        &format!("resizing \"{}\" to {to} frames", t.name),
        needed,
        request.memory_limit,
    )?;
    let mut new_shape = t.shape.clone();
    let at = new_shape.len() - 2;
    new_shape[at] = to;
    let o = &request.options;
    let antialias_applied = o.kernel != resample::Kernel::Nearest
        && o.kernel != resample::Kernel::Area
        && o.antialias_applies(t.frames, to);
    Ok(Some(TemporalChange {
        table: t.clone(),
        to,
        new_shape,
        options: request.options,
        antialias_applied,
    }))
}

impl Change for TemporalChange {
    fn name(&self) -> &str {
        &self.table.name
    }

    fn shape(&self) -> &[usize] {
        &self.table.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        vec![(self.table.name.as_str(), self.new_shape.as_slice())]
    }

    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed> {
        super::stretched(
            ckpt,
            &self.table.name,
            self.to,
            &self.options,
            allow_nonfinite,
        )
    }

    fn report(&self) -> ChangeReport {
        let o = &self.options;
        ChangeReport {
            name: self.table.name.clone(),
            kind: self.table.kind,
            dtype: self.table.dtype.to_string(),
            slots: 0,
            from: vec![self.table.frames],
            to: vec![self.to],
            shape: self.table.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: Some(o.kernel),
            coords: Some(o.coords),
            edges: Some(o.edges),
            antialias: self.antialias_applied,
            cubic_a: (o.kernel == resample::Kernel::Bicubic).then_some(o.cubic_a),
            method: "resampled",
            scale: None,
            companions: Vec::new(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        let o = &self.options;
        serde_json::json!({
            "name": self.table.name,
            "kind": self.table.kind,
            "method": "resampled",
            "from": [self.table.frames],
            "to": [self.to],
            "kernel": o.kernel,
            "coords": o.coords,
            "edges": o.edges,
            "antialias": o.antialias,
            "antialias_applied": self.antialias_applied,
            "cubic_a": o.cubic_a,
        })
    }

    fn needed_bytes(&self) -> u64 {
        (self.to as u64)
            .saturating_mul(self.table.dim as u64)
            .saturating_mul(32)
    }
}
