//! Fixed 2-D rotary frequency buffers (kind `rotary`): `…freqs_cos` and `…freqs_sin`,
//! `[G², 2d]`, the cosine and sine of the published 2-D rotary angles (positions
//! `t = arange(G)/G·L` per axis, frequencies `θ^(−2k/d)` repeated pairwise, the row-axis half
//! first). Recognised by their values, with θ, L and d read back; rebuilt exactly for the new
//! grid with the same θ, L and d — never interpolated. A buffer that does not fit the
//! construction is reported, not guessed.

use serde::Serialize;

use super::names::{normalized, parent};
use super::{serialize_dtype, value_tolerance, Change, ChangeReport, Computed, Discovery};
use super::{Encoding, Hints, Images, Kind, Skipped};
use crate::checkpoint::{Dtype, TensorEntry, TensorSource};
use crate::error::{Error, Result};
use crate::plan::Request;
use crate::rebuild::rotary::{self, RotaryParams, RoundParameters, Which};
use crate::values;

/// Buffers larger than this are not read (bounded memory).
const MAX_READ: u64 = 256 << 20;

/// A pair (or a lone one) of rotary buffers and the construction they follow.
#[derive(Debug, Clone, Serialize)]
pub struct RotaryBuffers {
    /// The cosine buffer (or the sine one when it is alone).
    pub name: String,
    pub kind: Kind,
    #[serde(serialize_with = "serialize_dtype")]
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    /// The grid `[G, G]`.
    pub grid: [usize; 2],
    /// The frequency base θ.
    pub theta: f64,
    /// The pre-training side L (positions span `[0, L)` at any grid).
    pub pretrain_side: f64,
    /// Channels per axis d (rows are 2d wide).
    pub axis_dim: usize,
    pub cos: Option<String>,
    pub sin: Option<String>,
    /// The other buffer of the pair, rebuilt with it.
    pub companions: Vec<String>,
    /// The model's patch size, for `--image`.
    pub patch: Option<usize>,
}

/// Names this kind recognises.
pub(crate) fn claims(name: &str) -> bool {
    which(name).is_some()
}

fn which(name: &str) -> Option<Which> {
    let n = normalized(name);
    if n.ends_with("freqscos") {
        Some(Which::Cos)
    } else if n.ends_with("freqssin") {
        Some(Which::Sin)
    } else {
        None
    }
}

/// Find every rotary buffer pair by name, and keep those whose values fit the construction.
pub(super) fn find(source: &dyn TensorSource, hints: &Hints, found: &mut Discovery) -> Result<()> {
    let named: Vec<(&TensorEntry, Which)> = source
        .entries()
        .iter()
        .filter_map(|e| which(&e.name).map(|w| (e, w)))
        .collect();
    let patch = found
        .tables
        .iter()
        .find_map(|t| t.patch)
        .or_else(|| super::absolute::model_patch(source.entries(), hints).map(|p| p.0));
    let mut done: Vec<&str> = Vec::new();
    for &(entry, w) in &named {
        if done.contains(&entry.name.as_str()) {
            continue;
        }
        // Its partner: the other buffer in the same module, of the same shape.
        let partner = named
            .iter()
            .find(|(e, w2)| {
                *w2 != w && parent(&e.name) == parent(&entry.name) && e.shape == entry.shape
            })
            .map(|(e, _)| *e);
        done.push(&entry.name);
        if let Some(p) = partner {
            done.push(&p.name);
        }
        let (cos, sin) = match w {
            Which::Cos => (Some(entry), partner),
            Which::Sin => (partner, Some(entry)),
        };
        match examine(source, cos, sin)? {
            Ok(params) => {
                let main = cos.or(sin).expect("one of the two");
                let rows = main.shape[0];
                let g = rows.isqrt();
                let companions = [cos, sin]
                    .into_iter()
                    .flatten()
                    .filter(|e| e.name != main.name)
                    .map(|e| e.name.clone())
                    .collect();
                found.encodings.push(Encoding::Rotary(RotaryBuffers {
                    name: main.name.clone(),
                    kind: Kind::Rotary,
                    dtype: main.dtype,
                    shape: main.shape.clone(),
                    grid: [g, g],
                    theta: params.theta,
                    pretrain_side: params.pretrain_side,
                    axis_dim: params.axis_dim,
                    cos: cos.map(|e| e.name.clone()),
                    sin: sin.map(|e| e.name.clone()),
                    companions,
                    patch,
                }))
            }
            Err(reason) => {
                for e in [cos, sin].into_iter().flatten() {
                    found.skipped.push(Skipped {
                        name: e.name.clone(),
                        reason: reason.clone(),
                    });
                }
            }
        }
    }
    Ok(())
}

/// The construction the buffers follow, or why they do not.
fn examine(
    source: &dyn TensorSource,
    cos: Option<&TensorEntry>,
    sin: Option<&TensorEntry>,
) -> Result<std::result::Result<RotaryParams, String>> {
    let main = cos.or(sin).expect("one of the two");
    let [rows, width] = main.shape[..] else {
        return Ok(Err(format!("shape {:?} is not [G*G, 2d]", main.shape)));
    };
    if !values::is_float(main.dtype) {
        return Ok(Err(format!(
            "dtype {} does not hold angles' cosines",
            main.dtype
        )));
    }
    if main.byte_len() > MAX_READ {
        return Ok(Err("too large to read; left unchanged".into()));
    }
    let read = |e: &TensorEntry| -> Result<Vec<f64>> {
        values::decode_f64(e.dtype, &source.bytes(e)?)
            .map_err(|err| values::value_error(source.source_path(), &e.name, err))
    };
    let tol = value_tolerance(main.dtype);
    // Half-precision values cannot pin the last digits of θ and L: round ones that fit win.
    let round = match main.dtype {
        Dtype::F16 | Dtype::BF16 => RoundParameters::WhenTheyFit,
        _ => RoundParameters::IfEstimateFails,
    };
    let params = match (cos, sin) {
        (Some(c), Some(s)) => {
            rotary::recognise_pair_rounding(&read(c)?, &read(s)?, rows, width, tol, round)
        }
        (Some(c), None) => {
            rotary::recognise_rounding(&read(c)?, rows, width, Which::Cos, tol, round)
        }
        (None, Some(s)) => {
            rotary::recognise_rounding(&read(s)?, rows, width, Which::Sin, tol, round)
        }
        (None, None) => None,
    };
    Ok(params.ok_or_else(|| {
        "values do not follow the 2-D rotary construction (square grid, θ^(-2k/d) frequencies repeated pairwise, row axis first); left unchanged".to_string()
    }))
}

/// One pair of rotary buffers to build anew.
#[derive(Debug, Clone, Serialize)]
pub struct RotaryChange {
    #[serde(flatten)]
    pub buffers: RotaryBuffers,
    pub to: [usize; 2],
    pub new_shape: Vec<usize>,
}

/// Plan the rebuild: `None` when the grid stays.
pub fn plan(
    ckpt: &dyn TensorSource,
    b: &RotaryBuffers,
    request: &Request,
) -> Result<Option<RotaryChange>> {
    let path = ckpt.source_path();
    let [h, w] = request.grid_for(path, &b.name, b.grid, b.patch)?;
    if h != w {
        return Err(Error::usage_in(path, format!(
            "\"{}\": rotary buffers of the 2-D construction hold a square grid; {h}x{w} is not square",
            b.name
        )));
    }
    if [h, w] == b.grid {
        return Ok(None);
    }
    let cells = h
        .checked_mul(w)
        .ok_or_else(|| super::too_large(path, &b.name, &format!("{h}x{w}")))?;
    let new_shape = vec![cells, 2 * b.axis_dim];
    let needed = (cells as u64)
        .saturating_mul(2 * b.axis_dim as u64)
        .saturating_mul(40);
    crate::kinds::within_guard(
        path,
        &format!("rebuilding \"{}\" for {h}x{w}", b.name),
        needed,
        request.memory_limit,
    )?;
    Ok(Some(RotaryChange {
        buffers: b.clone(),
        to: [h, w],
        new_shape,
    }))
}

impl RotaryChange {
    fn params(&self) -> RotaryParams {
        RotaryParams {
            theta: self.buffers.theta,
            pretrain_side: self.buffers.pretrain_side,
            axis_dim: self.buffers.axis_dim,
        }
    }
}

impl Change for RotaryChange {
    fn name(&self) -> &str {
        &self.buffers.name
    }

    fn shape(&self) -> &[usize] {
        &self.buffers.shape
    }

    fn rewrites(&self) -> Vec<(&str, &[usize])> {
        let b = &self.buffers;
        std::iter::once(b.name.as_str())
            .chain(b.companions.iter().map(String::as_str))
            .map(|n| (n, self.new_shape.as_slice()))
            .collect()
    }

    fn compute(&self, ckpt: &dyn TensorSource, _allow_nonfinite: bool) -> Result<Computed> {
        let path = ckpt.source_path();
        let b = &self.buffers;
        let limit = crate::rebuild::HARD_ELEMENT_LIMIT;
        let (cos, sin) = rotary::build(self.to[0], &self.params(), limit)
            .map_err(|e| Error::refused(path, format!("rebuilding \"{}\": {e}", b.name)))?;
        let mut out = Computed::default();
        for (name, v) in [(&b.cos, &cos), (&b.sin, &sin)] {
            let Some(name) = name else { continue };
            let entry = ckpt.find(name).expect("discovered buffers exist");
            let bytes = values::encode_f64(entry.dtype, v)
                .map_err(|e| values::value_error(path, name, e))?;
            out.bytes.push((name.clone(), bytes));
        }
        // The main buffer first, as `rewrites` lists it.
        out.bytes.sort_by_key(|(n, _)| *n != b.name);
        let main = ckpt.find(&b.name).expect("discovered buffers exist");
        let before = values::decode_f32(main.dtype, &ckpt.bytes(main)?)
            .map_err(|e| values::value_error(path, &b.name, e))?;
        let after = if b.cos.as_deref() == Some(b.name.as_str()) {
            &cos
        } else {
            &sin
        };
        let after = values::try_collect(after.len(), after.iter().map(|x| *x as f32))
            .map_err(|e| values::out_of_memory(path, &format!("rebuilding \"{}\"", b.name), e))?;
        out.images = Some(Images {
            before,
            after,
            from: b.grid,
            to: self.to,
            width: 2 * b.axis_dim,
            unscored: None,
        });
        Ok(out)
    }

    fn report(&self) -> ChangeReport {
        let b = &self.buffers;
        ChangeReport {
            name: b.name.clone(),
            kind: b.kind,
            dtype: b.dtype.to_string(),
            slots: 0,
            from: b.grid.to_vec(),
            to: self.to.to_vec(),
            shape: b.shape.clone(),
            new_shape: self.new_shape.clone(),
            kernel: None,
            coords: None,
            edges: None,
            antialias: false,
            cubic_a: None,
            method: "rebuilt",
            scale: None,
            companions: b.companions.clone(),
            fidelity: None,
        }
    }

    fn provenance(&self) -> serde_json::Value {
        let b = &self.buffers;
        serde_json::json!({
            "name": b.name,
            "kind": b.kind,
            "method": "rebuilt",
            "from": b.grid,
            "to": self.to,
            "theta": b.theta,
            "pretrain_side": b.pretrain_side,
            "axis_dim": b.axis_dim,
            "companions": b.companions,
        })
    }

    fn needed_bytes(&self) -> u64 {
        (self.new_shape[0] as u64)
            .saturating_mul(self.new_shape[1] as u64)
            .saturating_mul(40)
    }

    fn grid_change(&self) -> Option<([usize; 2], [usize; 2], usize)> {
        Some((self.buffers.grid, self.to, self.buffers.patch?))
    }
}
