//! Patch-projection kernels (kind `patch_kernel`), grid-dependent when the patch size changes
//! (`--new-patch`): convolution kernels `[D, C, p, q]` (channels first) or `[p, q, C, D]`
//! (channels last), found by the names released checkpoints give them and by the patch size
//! they set; without one, a linear patch embedding: a matrix named as a patch projection,
//! `[D, C·p·q]` (a linear layer's weight, out × in) or `[C·p·q, D]` (a dense kernel, in × out),
//! applied to each patch flattened channel by channel (`cyx`) or pixel by pixel (`yxc`). The
//! order is not in the shape: `--patch-order` gives it, else the values decide when one reading
//! is clearly smoother than the other (see [`flatten_order`]). Resized by the pseudo-inverse
//! method (see [`crate::rebuild::patch_kernel`]) in f64, so that every patch projects as before;
//! the bias is left as it is.

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
    /// A linear layer's weight `[D, C·p·q]` (out × in).
    LinearOutIn,
    /// A dense kernel `[C·p·q, D]` (in × out).
    LinearInOut,
}

/// The order in which a linear patch embedding flattens a patch.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Flatten {
    /// Channel by channel, each channel row by row: `[C, p, q]` (the order of a channels-first
    /// convolution kernel reshaped, and of the framework's unfold).
    Cyx,
    /// Pixel by pixel, row by row, the channels of a pixel together: `[p, q, C]`.
    Yxc,
}

impl std::str::FromStr for Flatten {
    type Err = String;
    fn from_str(s: &str) -> std::result::Result<Self, String> {
        match s {
            "cyx" => Ok(Flatten::Cyx),
            "yxc" => Ok(Flatten::Yxc),
            _ => Err(format!(
                "unknown value \"{s}\"; expected cyx (channel by channel) or yxc (pixel by pixel)"
            )),
        }
    }
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
    /// How a linear embedding flattens a patch, and what said so (`flag`, `values`, or
    /// `one_channel` and `one_pixel` where both orders are the same).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flatten: Option<Flatten>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub flatten_from: Option<&'static str>,
}

/// The patch-projection kernels of the model, when a new patch size is asked for: the kernels
/// the absolute tables took their patch size from, else the best-named one.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    if hints.new_patch.is_none() {
        if hints.patch_order.is_some() {
            found.warnings.push(
                "--patch-order: linear patch embeddings are read only for a new patch size (resize --new-patch); ignored".into(),
            );
        }
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
    if names.is_empty() {
        return find_linear(source, hints, found);
    }
    if hints.patch_order.is_some() {
        found.warnings.push(format!(
            "--patch-order: \"{}\" is a convolution kernel, whose shape gives its layout; ignored",
            names[0]
        ));
    }
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
        [d, c, p, q] if c <= 64 && p == q && p > 0 => (KernelLayout::ChannelsFirst, d, c, [p, q]),
        [p, q, c, d] if c <= 64 && p == q && p > 0 => (KernelLayout::ChannelsLast, d, c, [p, q]),
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
        flatten: None,
        flatten_from: None,
    })
}

/// Linear patch embeddings read from their values at most this large (bounded memory); a larger
/// one needs `--patch-order`.
const MAX_ORDER_READ: u64 = 64 << 20;

/// Linear patch embeddings, for a model without a convolution kernel: 2-D float matrices whose
/// name says patch (`patch_embed`, `to_patch_embedding`, `patchify`; common practice), read
/// with the position tables' width.
fn find_linear(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    let mut widths: Vec<usize> = found.tables.iter().map(|t| t.dim).collect();
    widths.sort_unstable();
    widths.dedup();
    let candidates = source.entries().iter().filter(|e| {
        let n = super::names::normalized(&e.name);
        e.shape.len() == 2
            && values::is_float(e.dtype)
            && n.contains("patch")
            && !n.contains("pos")
            && !n.ends_with("bias")
    });
    for entry in candidates {
        match linear_reading(source, entry, &widths, hints, &mut found.warnings)? {
            Ok(kernel) => found.encodings.push(Encoding::Patch(kernel)),
            Err(reason) => found.skipped.push(super::Skipped {
                name: entry.name.clone(),
                reason: format!("a linear patch embedding, not resized: {reason}"),
            }),
        }
    }
    Ok(())
}

/// A matrix read as a linear patch embedding, or why not.
fn linear_reading(
    source: &dyn TensorSource,
    e: &TensorEntry,
    widths: &[usize],
    hints: &Hints,
    warnings: &mut Vec<String>,
) -> Result<std::result::Result<PatchKernel, String>> {
    let layout = match linear_layout(e, widths) {
        Ok(layout) => layout,
        Err(why) => return Ok(Err(why)),
    };
    let (dim, inputs) = match (layout, &e.shape[..]) {
        (KernelLayout::LinearInOut, &[a, b]) => (b, a),
        (_, &[a, b]) => (a, b),
        _ => return Ok(Err("not a matrix".into())),
    };
    if !widths.is_empty() && !widths.contains(&dim) {
        return Ok(Err(format!(
            "its width {dim} is not the position tables' ({widths:?})"
        )));
    }
    let Some((channels, side)) = channels_and_side(inputs, hints.patch) else {
        return Ok(Err(match hints.patch {
            Some(p) => format!("{inputs} inputs are not C·{p}·{p} for a number of channels C ≤ 64"),
            None => format!("{inputs} inputs are not 3·p·p; pass --patch P to read C·P·P"),
        }));
    };
    let kernel = PatchKernel {
        name: e.name.clone(),
        kind: Kind::PatchKernel,
        dtype: e.dtype,
        shape: e.shape.clone(),
        layout,
        patch: [side, side],
        channels,
        dim,
        flatten: None,
        flatten_from: None,
    };
    Ok(
        linear_order(source, e, &kernel, hints, warnings)?.map(|(order, from)| PatchKernel {
            flatten: Some(order),
            flatten_from: Some(from),
            ..kernel
        }),
    )
}

/// Which axis of a matrix `[a, b]` is the width D: the name's suffix (`weight` is a linear
/// layer's `[out, in]`, `kernel` a dense layer's `[in, out]`; common practice), else the one
/// axis equal to a position table's width.
fn linear_layout(e: &TensorEntry, widths: &[usize]) -> std::result::Result<KernelLayout, String> {
    let lower = e.name.to_ascii_lowercase();
    if lower.ends_with("weight") {
        return Ok(KernelLayout::LinearOutIn);
    }
    if lower.ends_with("kernel") {
        return Ok(KernelLayout::LinearInOut);
    }
    match e.shape[..] {
        [a, b] if widths.contains(&a) && !widths.contains(&b) => Ok(KernelLayout::LinearOutIn),
        [a, b] if widths.contains(&b) && !widths.contains(&a) => Ok(KernelLayout::LinearInOut),
        _ => Err(format!(
            "which axis of {:?} is the embedding width is unclear",
            e.shape
        )),
    }
}

/// How `kernel` (the embedding `e`) flattens a patch and what said so, or why that is unknown:
/// nothing to tell with one channel or one pixel, else `--patch-order`, else the values.
fn linear_order(
    source: &dyn TensorSource,
    e: &TensorEntry,
    kernel: &PatchKernel,
    hints: &Hints,
    warnings: &mut Vec<String>,
) -> Result<std::result::Result<(Flatten, &'static str), String>> {
    if kernel.channels == 1 {
        return Ok(Ok((Flatten::Cyx, "one_channel")));
    }
    if kernel.patch == [1, 1] {
        return Ok(Ok((Flatten::Cyx, "one_pixel")));
    }
    if let Some(order) = hints.patch_order {
        return Ok(Ok((order, "flag")));
    }
    if e.byte_len() > MAX_ORDER_READ {
        return Ok(Err(format!(
            "over {} MiB, its flattening order is not read from the values; pass --patch-order cyx or yxc",
            MAX_ORDER_READ >> 20
        )));
    }
    let raw = source.bytes(e)?;
    refuse_nonfinite(source.source_path(), &e.name, e.dtype, &raw)?;
    let v = values::decode_f64(e.dtype, &raw).map_err(|err| {
        values::value_error(source.source_path(), "reading a patch embedding", err)
    })?;
    Ok(match flatten_order(kernel, &v) {
        Ok((order, note)) => {
            warnings.push(format!(
                "{}: read as a linear patch embedding flattened {note}; --patch-order overrides",
                e.name
            ));
            Ok((order, "values"))
        }
        Err(why) => Err(format!("{why}; pass --patch-order cyx or yxc")),
    })
}

/// Channels C and patch side p with `inputs = C·p·p`: p from `--patch`, else C = 3 (colour
/// images, common practice) when `inputs / 3` is a square.
fn channels_and_side(inputs: usize, patch: Option<usize>) -> Option<(usize, usize)> {
    let channels_for = |p: usize| {
        let area = p.checked_mul(p).filter(|&a| a > 0)?;
        let channels = inputs / area;
        (inputs % area == 0 && (1..=64).contains(&channels)).then_some((channels, p))
    };
    match patch {
        Some(p) => channels_for(p),
        None if inputs % 3 == 0 => {
            let p = (inputs as f64 / 3.0).sqrt().round() as usize;
            channels_for(p).filter(|(c, _)| *c == 3)
        }
        None => None,
    }
}

/// The flattening order of a linear embedding, from its values: trained patch kernels are
/// spatially smooth (neighbouring pixels get similar weights; common practice), so read in the
/// right order each channel's patch is smooth, and read in the wrong one it is not. The
/// roughness of a reading is the mean squared difference of neighbouring pixels over twice the
/// variance (1 for white noise, near 0 for a smooth patch); an order is taken when its
/// roughness is at most half and at most half the other's.
fn flatten_order(
    kernel: &PatchKernel,
    v: &[f64],
) -> std::result::Result<(Flatten, String), String> {
    let mut rough = [0.0; 2];
    for (at, order) in [Flatten::Cyx, Flatten::Yxc].into_iter().enumerate() {
        let reading = PatchKernel {
            flatten: Some(order),
            ..kernel.clone()
        };
        let canonical = rearrange(v, reading.axes(), CANONICAL, reading.sizes(kernel.patch))
            .map_err(|e| e.to_string())?;
        rough[at] = roughness(&canonical, kernel.patch).ok_or(
            "its patches are flat (each holds one value), so the values do not tell the flattening order",
        )?;
    }
    let [cyx, yxc] = rough;
    let clear = |a: f64, b: f64| a <= 0.5 && a <= 0.5 * b;
    let note = |what: &str| {
        format!("{what}, from its values (roughness {cyx:.2} read channel by channel, {yxc:.2} pixel by pixel)")
    };
    if clear(cyx, yxc) {
        Ok((Flatten::Cyx, note("channel by channel (cyx)")))
    } else if clear(yxc, cyx) {
        Ok((Flatten::Yxc, note("pixel by pixel (yxc)")))
    } else {
        Err(format!(
            "the values do not tell the flattening order (roughness {cyx:.2} read channel by channel, {yxc:.2} pixel by pixel; a clear order is at most half the other)"
        ))
    }
}

/// Mean squared difference of neighbouring pixels over twice the variance, over every `p×q`
/// patch of finite values `v` (each patch's mean removed); `None` where it is undefined (every
/// patch flat, or a patch of one pixel).
fn roughness(v: &[f64], [p, q]: [usize; 2]) -> Option<f64> {
    // A ratio: values scaled to at most 1 give the same one, and their squares cannot overflow.
    let largest = v.iter().fold(0.0f64, |m, x| m.max(x.abs()));
    let (mut diffs, mut pairs, mut spread) = (0.0, 0usize, 0.0);
    for patch in v.chunks_exact(p * q) {
        let at = |y: usize, x: usize| patch[y * q + x] / largest;
        let mean = patch.iter().map(|x| x / largest).sum::<f64>() / patch.len() as f64;
        spread += patch
            .iter()
            .map(|x| (x / largest - mean).powi(2))
            .sum::<f64>();
        for y in 0..p {
            for x in 0..q {
                if x + 1 < q {
                    diffs += (at(y, x + 1) - at(y, x)).powi(2);
                    pairs += 1;
                }
                if y + 1 < p {
                    diffs += (at(y + 1, x) - at(y, x)).powi(2);
                    pairs += 1;
                }
            }
        }
    }
    let rough = (diffs / pairs as f64) / (2.0 * spread / v.len() as f64);
    rough.is_finite().then_some(rough)
}

/// NaN or infinity cannot go through the pseudo-inverse (`--allow-nonfinite` cannot help):
/// a kernel holding them is refused for what it holds.
fn refuse_nonfinite(path: &std::path::Path, name: &str, dtype: Dtype, raw: &[u8]) -> Result<()> {
    match values::count_nonfinite(dtype, raw) {
        0 => Ok(()),
        bad => Err(Error::refused(
            path,
            format!("\"{name}\" holds {bad} NaN or infinite value(s); a patch kernel cannot be resized through them"),
        )),
    }
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
    let max = patch_kernel::MAX_PATCH_SIDE;
    if p > max || q > max {
        return Err(Error::Usage(format!(
            "--new-patch {p}x{q}: patches larger than {max} pixels a side are not resized"
        )));
    }
    // Checked before any arithmetic on them: an empty kernel may claim any patch.
    if k.patch.iter().any(|&side| side > max) {
        return Err(Error::refused(
            ckpt.source_path(),
            format!(
                "\"{}\" has patches of {}x{} pixels; patches larger than {max} pixels a side are not resized",
                k.name, k.patch[0], k.patch[1]
            ),
        ));
    }
    let new_shape = k.shape_for([p, q]);
    let needed = (k.dim as u64)
        .saturating_mul(k.channels as u64)
        .saturating_mul((p * q + k.patch[0] * k.patch[1]) as u64)
        .saturating_mul(24);
    crate::kinds::within_guard(
        ckpt.source_path(),
        &format!("resizing \"{}\"", k.name),
        needed,
        request.memory_limit,
    )?;
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

impl PatchKernel {
    /// The kernel's axes in storage order (a linear embedding's input axis split into the
    /// patch's channels, rows and columns in its flattening order).
    fn axes(&self) -> [Axis; 4] {
        use Axis::*;
        let order = self.flatten.unwrap_or(Flatten::Cyx);
        match (self.layout, order) {
            (KernelLayout::ChannelsFirst, _) | (KernelLayout::LinearOutIn, Flatten::Cyx) => {
                CANONICAL
            }
            (KernelLayout::ChannelsLast, _) | (KernelLayout::LinearInOut, Flatten::Yxc) => {
                [Rows, Cols, In, Out]
            }
            (KernelLayout::LinearOutIn, Flatten::Yxc) => [Out, Rows, Cols, In],
            (KernelLayout::LinearInOut, Flatten::Cyx) => [In, Rows, Cols, Out],
        }
    }

    /// Each axis's length for a patch of `[rows, cols]`.
    fn sizes(&self, [rows, cols]: [usize; 2]) -> impl Fn(Axis) -> usize + '_ {
        move |axis| match axis {
            Axis::Out => self.dim,
            Axis::In => self.channels,
            Axis::Rows => rows,
            Axis::Cols => cols,
        }
    }

    /// The stored shape for a patch of `[rows, cols]`.
    fn shape_for(&self, patch: [usize; 2]) -> Vec<usize> {
        let inputs = self.channels * patch[0] * patch[1];
        match self.layout {
            KernelLayout::LinearOutIn => vec![self.dim, inputs],
            KernelLayout::LinearInOut => vec![inputs, self.dim],
            _ => self.axes().map(self.sizes(patch)).to_vec(),
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
        refuse_nonfinite(path, &k.name, entry.dtype, &raw)?;
        let what = format!("resizing \"{}\"", k.name);
        let oom = |e| values::out_of_memory(path, &what, e);
        let v = values::decode_f64(entry.dtype, &raw)
            .map_err(|e| values::value_error(path, &what, e))?;
        let [p, q] = k.patch;
        let [p2, q2] = self.to;
        let first = rearrange(&v, k.axes(), CANONICAL, k.sizes(k.patch)).map_err(oom)?;
        let resized = patch_kernel::resize_kernels(
            &first,
            k.dim * k.channels,
            (p, q),
            (p2, q2),
            &patch_kernel::default_options(),
        )
        .map_err(|e| Error::refused(path, format!("{what}: {e}")))?;
        let stored = rearrange(&resized, CANONICAL, k.axes(), k.sizes(self.to)).map_err(oom)?;
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
            "flatten": self.kernel.flatten,
            "basis_resize": patch_kernel::default_options().kernel,
        })
    }

    fn patch_change(&self) -> Option<([usize; 2], [usize; 2])> {
        Some((self.kernel.patch, self.to))
    }

    fn needed_bytes(&self) -> u64 {
        let k = &self.kernel;
        (k.dim as u64 * k.channels as u64 * (self.to[0] * self.to[1]) as u64).saturating_mul(24)
    }
}
