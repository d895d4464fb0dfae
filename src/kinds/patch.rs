//! Patch-projection kernels (kind `patch_kernel`), grid-dependent when the patch size changes
//! (`--new-patch`): `[D, C, p, q]` (channels first) or `[p, q, C, D]` (channels last), found by
//! the names released checkpoints give them and by the patch size they set. Resized by the
//! pseudo-inverse method (see [`crate::rebuild::patch_kernel`]) in f64, so that every patch
//! projects as before; the bias is left as it is.

use serde::Serialize;

use super::{serialize_dtype, Change, ChangeReport, Computed, Discovery, Encoding, Hints, Kind};
use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::{Error, Result};
use crate::plan::Request;
use crate::rebuild::patch_kernel;
use crate::values;

/// How a kernel's axes are laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum KernelLayout {
    /// `[D, C, p, q]`
    ChannelsFirst,
    /// `[p, q, C, D]`
    ChannelsLast,
}

/// A patch-projection kernel.
#[derive(Debug, Clone, Serialize)]
pub struct PatchKernel {
    pub name: String,
    pub kind: Kind,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub layout: KernelLayout,
    /// The patch `[p, q]` in pixels.
    pub patch: [usize; 2],
    pub channels: usize,
    pub dim: usize,
}

/// The patch-projection kernels of the model, when a new patch size is asked for: the kernels
/// the absolute tables took their patch size from, else the best-named one.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    if hints.new_patch.is_none() {
        return Ok(());
    }
    let mut names: Vec<String> = found
        .tables
        .iter()
        .filter_map(|t| t.patch_source.clone())
        .filter(|n| source.find(n).is_some())
        .collect();
    if names.is_empty() {
        names.extend(
            super::absolute::model_patch(source.entries(), &Hints::default()).map(|(_, n)| n),
        );
    }
    names.dedup();
    for name in names {
        let entry = source.find(&name).expect("checked above");
        match reading(entry) {
            Some(kernel) => found.encodings.push(Encoding::Patch(kernel)),
            None => found.skipped.push(super::Skipped {
                name,
                reason: "not a 4-D float patch kernel [D, C, p, q] or [p, q, C, D]; a new patch size needs one".into(),
            }),
        }
    }
    Ok(())
}

fn reading(e: &TensorEntry) -> Option<PatchKernel> {
    if !values::is_float(e.dtype) {
        return None;
    }
    let (layout, dim, channels, patch) = match e.shape[..] {
        [d, c, p, q] if c <= 64 && p == q => (KernelLayout::ChannelsFirst, d, c, [p, q]),
        [p, q, c, d] if c <= 64 && p == q => (KernelLayout::ChannelsLast, d, c, [p, q]),
        _ => return None,
    };
    Some(PatchKernel {
        name: e.name.clone(),
        kind: Kind::PatchKernel,
        dtype: e.dtype,
        shape: e.shape.clone(),
        layout,
        patch,
        channels,
        dim,
    })
}

/// One kernel to resize.
#[derive(Debug, Clone, Serialize)]
pub struct PatchChange {
    #[serde(flatten)]
    pub kernel: PatchKernel,
    pub to: [usize; 2],
    pub new_shape: Vec<usize>,
}

/// Plan the resize: `None` without `--new-patch` or when the patch stays.
pub fn plan(
    ckpt: &dyn TensorSource,
    k: &PatchKernel,
    request: &Request,
) -> Result<Option<PatchChange>> {
    let Some((p, q)) = request.new_patch else {
        return Ok(None);
    };
    if [p, q] == k.patch {
        return Ok(None);
    }
    if p > patch_kernel::MAX_PATCH_SIDE || q > patch_kernel::MAX_PATCH_SIDE {
        return Err(Error::Usage(format!(
            "--new-patch {p}x{q}: patches larger than {} pixels a side are not resized",
            patch_kernel::MAX_PATCH_SIDE
        )));
    }
    let new_shape = match k.layout {
        KernelLayout::ChannelsFirst => vec![k.dim, k.channels, p, q],
        KernelLayout::ChannelsLast => vec![p, q, k.channels, k.dim],
    };
    let needed = (k.dim as u64 * k.channels as u64 * (p * q + k.patch[0] * k.patch[1]) as u64)
        .saturating_mul(24);
    if needed > request.memory_limit {
        return Err(Error::refused(
            ckpt.source_path(),
            format!(
                "resizing \"{}\" needs about {} MiB, over the {} MiB guard; raise it with --memory-limit",
                k.name,
                needed >> 20,
                request.memory_limit >> 20
            ),
        ));
    }
    Ok(Some(PatchChange {
        kernel: k.clone(),
        to: [p, q],
        new_shape,
    }))
}

/// One axis of a stored kernel.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Axis {
    Out,
    In,
    Rows,
    Cols,
}

/// The order the resize works in: `D·C` consecutive row-major patches.
const CANONICAL: [Axis; 4] = [Axis::Out, Axis::In, Axis::Rows, Axis::Cols];

impl KernelLayout {
    /// The kernel's axes in storage order.
    fn axes(self) -> [Axis; 4] {
        match self {
            KernelLayout::ChannelsFirst => CANONICAL,
            KernelLayout::ChannelsLast => [Axis::Rows, Axis::Cols, Axis::In, Axis::Out],
        }
    }
}

/// `v`, stored with its axes in `from` order, rewritten with them in `to` order; `size` gives
/// each axis's length.
fn rearrange(
    v: &[f64],
    from: [Axis; 4],
    to: [Axis; 4],
    size: impl Fn(Axis) -> usize,
) -> std::result::Result<Vec<f64>, values::OutOfMemory> {
    let stride = |axis: Axis| -> usize {
        let at = from.iter().position(|a| *a == axis).expect("every axis");
        from[at + 1..].iter().map(|a| size(*a)).product()
    };
    let [n0, n1, n2, n3] = to.map(&size);
    let [s0, s1, s2, s3] = to.map(stride);
    let mut out = values::try_filled(v.len(), 0.0)?;
    let mut at = 0;
    for i in 0..n0 {
        for j in 0..n1 {
            for k in 0..n2 {
                for l in 0..n3 {
                    out[at] = v[i * s0 + j * s1 + k * s2 + l * s3];
                    at += 1;
                }
            }
        }
    }
    Ok(out)
}

impl Change for PatchChange {
    fn name(&self) -> &str {
        &self.kernel.name
    }

    fn shape(&self) -> &[usize] {
        &self.kernel.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        vec![(self.kernel.name.as_str(), self.new_shape.as_slice())]
    }

    fn compute(&self, ckpt: &dyn TensorSource, allow_nonfinite: bool) -> Result<Computed> {
        let path = ckpt.source_path();
        let k = &self.kernel;
        let entry = ckpt.find(&k.name).expect("planned kernels exist");
        let raw = ckpt.bytes(entry)?;
        if !allow_nonfinite {
            super::refuse_nonfinite(path, &k.name, entry.dtype, &raw, "")?;
        }
        let what = format!("resizing \"{}\"", k.name);
        let oom = |e| values::out_of_memory(path, &what, e);
        let v = values::decode_f64(entry.dtype, &raw)
            .map_err(|e| values::value_error(path, &what, e))?;
        let [p, q] = k.patch;
        let [p2, q2] = self.to;
        let sides = |[rows, cols]: [usize; 2]| {
            move |axis| match axis {
                Axis::Out => k.dim,
                Axis::In => k.channels,
                Axis::Rows => rows,
                Axis::Cols => cols,
            }
        };
        let first = rearrange(&v, k.layout.axes(), CANONICAL, sides(k.patch)).map_err(oom)?;
        let resized = patch_kernel::resize_kernels(
            &first,
            k.dim * k.channels,
            (p, q),
            (p2, q2),
            &patch_kernel::default_options(),
        )
        .map_err(|e| Error::refused(path, format!("{what}: {e}")))?;
        let stored =
            rearrange(&resized, CANONICAL, k.layout.axes(), sides(self.to)).map_err(oom)?;
        let bytes = values::encode_f64(entry.dtype, &stored)
            .map_err(|e| values::value_error(path, &what, e))?;
        if !allow_nonfinite {
            super::refuse_nonfinite(path, &k.name, entry.dtype, &bytes, " after resizing")?;
        }
        Ok(Computed {
            bytes: vec![(k.name.clone(), bytes)],
            images: None,
        })
    }

    fn report(&self) -> ChangeReport {
        let k = &self.kernel;
        ChangeReport {
            name: k.name.clone(),
            kind: k.kind,
            dtype: k.dtype.to_string(),
            slots: 0,
            from: k.patch.to_vec(),
            to: self.to.to_vec(),
            shape: k.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: Some(patch_kernel::default_options().kernel),
            coords: Some(patch_kernel::default_options().coords),
            edges: Some(patch_kernel::default_options().edges),
            antialias: patch_kernel::default_options().antialias_applies(k.patch[0], self.to[0])
                || patch_kernel::default_options().antialias_applies(k.patch[1], self.to[1]),
            cubic_a: None,
            method: "pseudo-inverse",
            scale: None,
            companions: Vec::new(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        serde_json::json!({
            "name": self.kernel.name,
            "kind": self.kernel.kind,
            "method": "pseudo-inverse",
            "from": self.kernel.patch,
            "to": self.to,
            "layout": self.kernel.layout,
            "basis_resize": patch_kernel::default_options().kernel,
        })
    }

    fn needed_bytes(&self) -> u64 {
        let k = &self.kernel;
        (k.dim as u64 * k.channels as u64 * (self.to[0] * self.to[1]) as u64).saturating_mul(24)
    }
}
