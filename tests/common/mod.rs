//! Test checkpoints, written by the reference `safetensors` crate's serializer so the files
//! posgrid reads in tests come from an outside writer.

#![allow(dead_code)]

pub mod golden;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use half::bf16;
use safetensors::tensor::{serialize_to_file, Dtype, TensorView};

/// One tensor to write: name, dtype, shape, raw little-endian bytes.
pub struct T {
    pub name: String,
    pub dtype: Dtype,
    pub shape: Vec<usize>,
    pub bytes: Vec<u8>,
}

/// Float values stored in `dtype` (F32, BF16, F16 or F64).
pub fn floats(name: &str, dtype: Dtype, shape: &[usize], values: &[f64]) -> T {
    assert_eq!(values.len(), shape.iter().product::<usize>(), "{name}");
    let bytes = match dtype {
        Dtype::F32 => values
            .iter()
            .flat_map(|v| (*v as f32).to_le_bytes())
            .collect(),
        Dtype::F64 => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        Dtype::BF16 => values
            .iter()
            .flat_map(|v| bf16::from_f64(*v).to_le_bytes())
            .collect(),
        Dtype::F16 => values
            .iter()
            .flat_map(|v| half::f16::from_f64(*v).to_le_bytes())
            .collect(),
        d => panic!("not a float dtype {d}"),
    };
    T {
        name: name.into(),
        dtype,
        shape: shape.to_vec(),
        bytes,
    }
}

/// 0..n as I64 position ids in `shape`.
pub fn ids(name: &str, shape: &[usize]) -> T {
    let n: usize = shape.iter().product();
    T {
        name: name.into(),
        dtype: Dtype::I64,
        shape: shape.to_vec(),
        bytes: (0..n as i64).flat_map(|v| v.to_le_bytes()).collect(),
    }
}

/// Deterministic pseudo-random values in [-scale, scale).
pub fn noise(n: usize, seed: u64, scale: f64) -> Vec<f64> {
    let mut s = seed
        .wrapping_mul(6364136223846793005)
        .wrapping_add(1442695040888963407)
        | 1;
    (0..n)
        .map(|_| {
            s ^= s << 13;
            s ^= s >> 7;
            s ^= s << 17;
            ((s >> 11) as f64 / (1u64 << 53) as f64 * 2.0 - 1.0) * scale
        })
        .collect()
}

/// A table that looks trained: `slots` noisy class rows, then an h×w grid whose channels
/// vary slowly over the grid.
pub fn smooth_table(slots: usize, h: usize, w: usize, d: usize, seed: u64) -> Vec<f64> {
    let phase = noise(d * 4, seed, std::f64::consts::PI);
    let mut v = noise(slots * d, seed + 1, 0.02);
    for r in 0..h {
        for c in 0..w {
            for k in 0..d {
                let fy = 0.2 + 0.3 * (k % 5) as f64 / 5.0;
                let fx = 0.2 + 0.3 * (k % 7) as f64 / 7.0;
                v.push(
                    0.02 * ((fy * r as f64 + phase[k]).cos()
                        + (fx * c as f64 + phase[d + k]).sin()),
                );
            }
        }
    }
    v
}

/// The fixed 2-D sine-cosine table as the trade publishes it (common practice, written here
/// from the formula, independently of posgrid's own code): the first half of the channels
/// encodes the column index, the second the row; each half is [sin(p·ω), cos(p·ω)] with
/// ω_k = 1 / 10000^(k / (d/4)), d the full width.
pub fn sincos_table(slots: usize, h: usize, w: usize, d: usize) -> Vec<f64> {
    let quarter = d / 4;
    let mut v = vec![0.0; slots * d];
    for r in 0..h {
        for c in 0..w {
            let mut row = vec![0.0; d];
            for k in 0..quarter {
                let om = 1.0 / 10000f64.powf(k as f64 / quarter as f64);
                row[k] = (c as f64 * om).sin();
                row[quarter + k] = (c as f64 * om).cos();
                row[2 * quarter + k] = (r as f64 * om).sin();
                row[3 * quarter + k] = (r as f64 * om).cos();
            }
            v.extend(row);
        }
    }
    v
}

/// Write tensors (and optional metadata) with the reference serializer.
pub fn write(dir: &Path, file: &str, tensors: &[T], meta: Option<&[(&str, &str)]>) -> PathBuf {
    let path = dir.join(file);
    let views: Vec<(String, TensorView)> = tensors
        .iter()
        .map(|t| {
            (
                t.name.clone(),
                TensorView::new(t.dtype, t.shape.clone(), &t.bytes).unwrap(),
            )
        })
        .collect();
    let meta: Option<HashMap<String, String>> = meta.map(|m| {
        m.iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    });
    serialize_to_file(views, meta, &path).unwrap();
    path
}

/// A file of raw bytes (for broken headers).
pub fn raw(dir: &Path, file: &str, bytes: &[u8]) -> PathBuf {
    let path = dir.join(file);
    std::fs::write(&path, bytes).unwrap();
    path
}

/// A safetensors file from a header text and a data area, assembled by hand.
pub fn crafted(dir: &Path, file: &str, header: &str, data: &[u8]) -> PathBuf {
    let mut bytes = (header.len() as u64).to_le_bytes().to_vec();
    bytes.extend_from_slice(header.as_bytes());
    bytes.extend_from_slice(data);
    raw(dir, file, &bytes)
}

/// Run the posgrid binary (from the crate's folder) with `args`.
pub fn posgrid<S: AsRef<std::ffi::OsStr>>(args: &[S]) -> std::process::Output {
    std::process::Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(args)
        .output()
        .unwrap()
}

/// The exit code of a run (-1 when a signal ended it).
pub fn code(o: &std::process::Output) -> i32 {
    o.status.code().unwrap_or(-1)
}

/// What a run printed on stderr.
pub fn stderr(o: &std::process::Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

/// A path as the `&str` an argument list takes.
pub fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

/// The names in a directory, sorted.
pub fn entries(dir: &Path) -> Vec<String> {
    let mut v: Vec<String> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
        .collect();
    v.sort();
    v
}
