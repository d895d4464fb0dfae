//! `resize --new-patch` end to end, over the kernel layouts a checkpoint may hold.

mod common;

use common::*;
use posgrid::checkpoint::{Checkpoint, TensorSource};
use safetensors::Dtype;

fn values(ckpt: &Checkpoint, name: &str) -> Vec<f64> {
    let e = ckpt.find(name).unwrap();
    posgrid::values::decode_f64(e.dtype, &ckpt.bytes(e).unwrap()).unwrap()
}

/// `[D, C, p, q]` → `[p, q, C, D]`.
fn channels_last(v: &[f64], [d, c, p, q]: [usize; 4]) -> Vec<f64> {
    let mut out = vec![0.0; v.len()];
    for (n, value) in v.iter().enumerate() {
        let (dd, rest) = (n / (c * p * q), n % (c * p * q));
        let (cc, rest) = (rest / (p * q), rest % (p * q));
        let (y, x) = (rest / q, rest % q);
        out[((y * q + x) * c + cc) * d + dd] = *value;
    }
    out
}

/// Resize one kernel file with `args` and return the kernel's new values.
fn resized_kernel(shape: &[usize], stored: &[f64], dim: usize, args: &[&str]) -> Vec<f64> {
    let dir = tempfile::tempdir().unwrap();
    let file = write(
        dir.path(),
        "in.safetensors",
        &[
            floats("patch_embed.proj.weight", Dtype::F64, shape, stored),
            floats(
                "pos_embed",
                Dtype::F64,
                &[1, 17, dim],
                &noise(17 * dim, 3, 0.1),
            ),
        ],
        None,
    );
    let out = dir.path().join("out.safetensors");
    let mut all = vec!["resize", s(&file), "-o", s(&out)];
    all.extend_from_slice(args);
    let o = posgrid(&all);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    values(&Checkpoint::open(&out).unwrap(), "patch_embed.proj.weight")
}

/// A non-square new patch: the channels-last kernel holds the same values as the channels-first
/// one, rows along the height (a transposition of either layout is the same kernel read the
/// other way; both must come out the same kernel).
#[test]
fn channels_last_kernels_take_non_square_patches_the_right_way_round() {
    let (dim, channels) = (4, 3);
    let first = noise(dim * channels * 8 * 8, 11, 1.0);
    let args = ["--image", "48x40", "--new-patch", "12x10"];
    let by_first = resized_kernel(&[dim, channels, 8, 8], &first, dim, &args);
    let last = channels_last(&first, [dim, channels, 8, 8]);
    let by_last = resized_kernel(&[8, 8, channels, dim], &last, dim, &args);
    let expected = channels_last(&by_first, [dim, channels, 12, 10]);
    assert_eq!(by_last.len(), expected.len());
    let worst = by_last
        .iter()
        .zip(&expected)
        .fold(0f64, |m, (a, b)| m.max((a - b).abs()));
    assert!(worst <= 1e-12, "{worst}");
}

/// Shrinking patches: the CLI's default resize is the framework's antialiased bilinear
/// interpolate (fixtures/golden/patch_cases.safetensors, case bilinear_aa_8_6: B from torch's
/// interpolate with antialias=True, ŵ by numpy's pinv).
#[test]
fn shrunk_kernels_use_the_framework_antialiased_resize() {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fixtures/golden/patch_cases.safetensors");
    let golden = Checkpoint::open(&path).unwrap();
    let w = values(&golden, "bilinear_aa_8_6.w");
    let expected = values(&golden, "bilinear_aa_8_6.w_new");
    let count = w.len() / 64;
    let got = resized_kernel(
        &[count, 1, 8, 8],
        &w,
        count,
        &["--image", "24", "--new-patch", "6"],
    );
    let scale = expected.iter().fold(0f64, |m, v| m.max(v.abs()));
    let worst = got
        .iter()
        .zip(&expected)
        .fold(0f64, |m, (a, b)| m.max((a - b).abs()));
    assert!(worst <= 1e-8 * scale, "{worst}");
}
