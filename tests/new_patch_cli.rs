//! `resize --new-patch` end to end, over the kernel layouts a checkpoint may hold.

mod common;

use common::golden::Golden;
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

/// A kernel to resize, stored under `name` beside a 4x4-grid position table of its width.
struct Kernel<'a> {
    name: &'a str,
    dtype: Dtype,
    shape: &'a [usize],
    values: &'a [f64],
    dim: usize,
}

/// Resize `kernel`'s file with `args`: the command's output and the kernel's new values (none
/// when nothing was written).
fn resize_kernel(kernel: &Kernel, args: &[&str]) -> (std::process::Output, Option<Vec<f64>>) {
    let dir = tempfile::tempdir().unwrap();
    let dim = kernel.dim;
    let file = write(
        dir.path(),
        "in.safetensors",
        &[
            floats(kernel.name, kernel.dtype, kernel.shape, kernel.values),
            floats(
                "pos_embedding",
                kernel.dtype,
                &[1, 17, dim],
                &noise(17 * dim, 5, 0.1),
            ),
        ],
        None,
    );
    let out = dir.path().join("out.safetensors");
    let mut all = vec!["resize", s(&file), "-o", s(&out)];
    all.extend_from_slice(args);
    let o = posgrid(&all);
    let got = out
        .exists()
        .then(|| values(&Checkpoint::open(&out).unwrap(), kernel.name));
    (o, got)
}

/// A convolution kernel `[D, C, p, q]` or `[p, q, C, D]` in F64, resized with `args`.
fn resized_kernel(shape: &[usize], stored: &[f64], dim: usize, args: &[&str]) -> Vec<f64> {
    let kernel = Kernel {
        name: "patch_embed.proj.weight",
        dtype: Dtype::F64,
        shape,
        values: stored,
        dim,
    };
    let (o, got) = resize_kernel(&kernel, args);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    got.unwrap()
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
    let golden = Golden::open("fixtures/golden/patch_cases.safetensors");
    let w = golden.read_f64("bilinear_aa_8_6.w").0;
    let expected = golden.read_f64("bilinear_aa_8_6.w_new").0;
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

/// The linear-embedding golden file (fixtures/golden/make_linear_patch_golden.py): matrices in
/// both flattening orders and both storages, checked there against the framework's convolution,
/// unfold and a channels-last flatten; their pseudo-inverse resizes by numpy's pinv; random
/// patches resized by the framework's interpolate, with the old outputs.
fn linear_golden() -> Golden {
    Golden::open("fixtures/golden/linear_patch_cases.safetensors")
}

/// Tensor `what` of `case` and its shape.
fn get(golden: &Golden, case: &serde_json::Value, what: &str) -> (Vec<f64>, Vec<usize>) {
    golden.read_f64(&format!("{}.{what}", case["name"].as_str().unwrap()))
}

fn case_named<'a>(golden: &'a Golden, name: &str) -> &'a serde_json::Value {
    golden.cases.iter().find(|c| c["name"] == name).unwrap()
}

fn side(case: &serde_json::Value, key: &str) -> usize {
    case[key].as_u64().unwrap() as usize
}

/// A linear layer's weight is `.weight` ([out, in]); a dense layer's is `.kernel` ([in, out]).
fn embedding_name(case: &serde_json::Value) -> &'static str {
    if case["storage"] == "out_in" {
        "to_patch_embedding.1.weight"
    } else {
        "patch_embed/proj/kernel"
    }
}

/// Resize the case's embedding with a 4x4 grid of the new patch; the new matrix and the report.
fn resize_linear(
    golden: &Golden,
    case: &serde_json::Value,
    extra: &[&str],
) -> (std::process::Output, Option<Vec<f64>>) {
    let (w, shape) = get(golden, case, "w");
    let image = (4 * side(case, "to")).to_string();
    let new_patch = side(case, "to").to_string();
    let mut args = vec!["--image", &image, "--new-patch", &new_patch, "--json"];
    args.extend_from_slice(extra);
    let kernel = Kernel {
        name: embedding_name(case),
        dtype: Dtype::F32,
        shape: &shape,
        values: &w,
        dim: side(case, "dim"),
    };
    resize_kernel(&kernel, &args)
}

fn worst_relative(got: &[f64], expected: &[f64]) -> f64 {
    assert_eq!(got.len(), expected.len());
    let scale = expected.iter().fold(0f64, |m, v| m.max(v.abs()));
    got.iter()
        .zip(expected)
        .fold(0f64, |m, (a, b)| m.max((a - b).abs()))
        / scale
}

/// `y = x · wᵀ` for rows of `x` and a matrix stored `[out, in]` or `[in, out]`.
fn project(x: &[f64], w: &[f64], inputs: usize, dim: usize, out_in: bool) -> Vec<f64> {
    let mut y = Vec::new();
    for row in x.chunks_exact(inputs) {
        for d in 0..dim {
            let weight = |i: usize| {
                if out_in {
                    w[d * inputs + i]
                } else {
                    w[i * dim + d]
                }
            };
            y.push(row.iter().enumerate().map(|(i, v)| v * weight(i)).sum());
        }
    }
    y
}

/// Linear embeddings in both flattening orders and storages, the order read from the values
/// (the kernels are smooth, like trained ones): the new matrices equal numpy's pinv result
/// (F32 storage: 1e-6), and when enlarging, every resized patch projects as the original did
/// (the issue's 1e-5).
#[test]
fn linear_embeddings_match_numpy_and_project_resized_patches_as_before() {
    let golden = linear_golden();
    let mut checked = 0;
    // The square case holds every principal component, so no order is smoother: read apart.
    let smooth = |c: &&serde_json::Value| {
        c["kernels"] == "pca" && !c["name"].as_str().unwrap().starts_with("square")
    };
    for case in golden.cases.iter().filter(smooth) {
        let (o, got) = resize_linear(&golden, case, &[]);
        assert_eq!(code(&o), 0, "{}: {}", case["name"], stderr(&o));
        let got = got.unwrap();
        let (expected, _) = get(&golden, case, "w_new");
        let err = worst_relative(&got, &expected);
        assert!(
            err <= 1e-6,
            "{}: new matrix {err:.1e} from numpy",
            case["name"]
        );
        let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        let change = report["tables"]
            .as_array()
            .unwrap()
            .iter()
            .find(|t| t["kind"] == "patch_kernel")
            .unwrap();
        assert_eq!(change["method"], "pseudo-inverse");
        if side(case, "to") > side(case, "from") {
            let (bx, _) = get(&golden, case, "bx");
            let (y, _) = get(&golden, case, "y");
            let inputs = 3 * side(case, "to") * side(case, "to");
            let projected = project(
                &bx,
                &got,
                inputs,
                side(case, "dim"),
                case["storage"] == "out_in",
            );
            let err = worst_relative(&projected, &y);
            assert!(err <= 1e-5, "{}: projections {err:.1e} off", case["name"]);
        }
        checked += 1;
    }
    assert_eq!(checked, 4);
}

/// White-noise kernels have no smoother order: the embedding is listed as skipped with the flag
/// that settles it, nothing is written; with the flag it is resized as numpy's pinv says.
#[test]
fn an_unclear_flattening_order_needs_the_flag() {
    let golden = linear_golden();
    let case = case_named(&golden, "noise_out_in_8_12");
    let (o, got) = resize_linear(&golden, case, &[]);
    assert_ne!(code(&o), 0, "{}", String::from_utf8_lossy(&o.stdout));
    assert!(stderr(&o).contains("--patch-order"), "{}", stderr(&o));
    assert!(got.is_none());
    let (o, got) = resize_linear(&golden, case, &["--patch-order", "cyx"]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let (expected, _) = get(&golden, case, "w_new");
    let err = worst_relative(&got.unwrap(), &expected);
    assert!(err <= 1e-6, "{err:.1e}");
}

/// A new patch size without a kernel to resize would leave the model projecting old patches
/// onto the new grid: refused (exit 4), naming the flag, nothing written.
#[test]
fn a_new_patch_without_a_kernel_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(
        dir.path(),
        "in.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, 8],
            &noise(17 * 8, 5, 0.1),
        )],
        None,
    );
    let out = dir.path().join("out.safetensors");
    let o = posgrid(&[
        "resize",
        s(&file),
        "-o",
        s(&out),
        "--image",
        "64",
        "--new-patch",
        "16",
        "--patch",
        "14",
    ]);
    assert_eq!(code(&o), 4, "{}", stderr(&o));
    assert!(stderr(&o).contains("--new-patch 16x16"), "{}", stderr(&o));
    assert!(!out.exists());
}

/// A square matrix `[D, D]` with D = 3·p·p (ViT-B/16's 768 = 3·16·16 is such a case): the
/// name's suffix says which axis is the width — a linear layer's `weight` is [out, in], a dense
/// layer's `kernel` [in, out] (common practice). The golden case (48 = 3·4·4, the full basis of
/// principal components, so the order is given by the flag) read both ways gives numpy's result.
#[test]
fn square_linear_embeddings_are_read_by_their_name() {
    let golden = linear_golden();
    let case = case_named(&golden, "square_yxc_out_in_4_6");
    let (expected, _) = get(&golden, case, "w_new");
    let (o, got) = resize_linear(&golden, case, &["--patch-order", "yxc"]);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let err = worst_relative(&got.unwrap(), &expected);
    assert!(err <= 1e-6, "as a weight: {err:.1e}");

    // The same matrix stored [in, out] under a dense layer's name.
    let (w, _) = get(&golden, case, "w");
    let (dim, inputs) = (48, 48);
    let transpose = |v: &[f64], rows: usize, cols: usize| -> Vec<f64> {
        (0..v.len())
            .map(|n| v[(n % rows) * cols + n / rows])
            .collect()
    };
    let stored = transpose(&w, dim, inputs);
    let kernel = Kernel {
        name: "patch_embed/proj/kernel",
        dtype: Dtype::F32,
        shape: &[inputs, dim],
        values: &stored,
        dim,
    };
    let args = ["--image", "24", "--new-patch", "6", "--patch-order", "yxc"];
    let (o, got) = resize_kernel(&kernel, &args);
    assert_eq!(code(&o), 0, "{}", stderr(&o));
    let got = got.unwrap();
    let err = worst_relative(&got, &transpose(&expected, dim, 3 * 36));
    assert!(err <= 1e-6, "as a kernel: {err:.1e}");
}

/// A patch kernel [D, 1, 14, 14] resized to 16x16 equals numpy's pseudo-inverse result
/// (fixtures/golden/patch_cases.safetensors, written by fixtures/golden/make_patch_golden.py:
/// pinv(B^T) w with B from torch's bilinear interpolate of each basis image), in both kernel
/// layouts, with the report saying so; the grid follows --image / P (64 / 16 = 4: the table is
/// at its target).
#[test]
fn new_patch_kernels_match_the_pseudo_inverse_of_numpy() {
    let golden = Golden::open("fixtures/golden/patch_cases.safetensors");
    let w = golden.read_f64("bilinear_14_16.w").0;
    let expected = golden.read_f64("bilinear_14_16.w_new").0;
    let count = w.len() / (14 * 14);
    let args = ["--image", "64", "--new-patch", "16", "--json"];
    for channels_last_layout in [false, true] {
        let (shape, stored) = if channels_last_layout {
            (
                vec![14, 14, 1, count],
                channels_last(&w, [count, 1, 14, 14]),
            )
        } else {
            (vec![count, 1, 14, 14], w.clone())
        };
        let kernel = Kernel {
            name: "patch_embed.proj.weight",
            dtype: Dtype::F64,
            shape: &shape,
            values: &stored,
            dim: count,
        };
        let (o, got) = resize_kernel(&kernel, &args);
        assert_eq!(code(&o), 0, "{}", stderr(&o));
        let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
        let tables = report["tables"].as_array().unwrap();
        assert!(tables
            .iter()
            .any(|t| t["kind"] == "patch_kernel" && t["method"] == "pseudo-inverse"));
        assert!(
            report["already_at_target"]
                .as_array()
                .unwrap()
                .iter()
                .any(|n| n == "pos_embedding"),
            "{report}"
        );
        let mut got = got.unwrap();
        if channels_last_layout {
            got = channels_first(&got, [count, 1, 16, 16]);
        }
        let err = worst_relative(&got, &expected);
        assert!(
            err <= 1e-8,
            "channels last {channels_last_layout}: {err:.1e}"
        );
    }
}

/// `[p, q, C, D]` → `[D, C, p, q]`.
fn channels_first(v: &[f64], [d, c, p, q]: [usize; 4]) -> Vec<f64> {
    let mut out = vec![0.0; v.len()];
    for (n, value) in out.iter_mut().enumerate() {
        let (dd, rest) = (n / (c * p * q), n % (c * p * q));
        let (cc, rest) = (rest / (p * q), rest % (p * q));
        let (y, x) = (rest / q, rest % q);
        *value = v[((y * q + x) * c + cc) * d + dd];
    }
    out
}

/// A hostile checkpoint run through `resize` with `args`: the outcome, whether OUT appeared,
/// and the input checked unchanged.
struct Attempt {
    output: std::process::Output,
    wrote: bool,
}

fn attempt(tensors: &[common::T], args: &[&str]) -> Attempt {
    let dir = tempfile::tempdir().unwrap();
    let file = write(dir.path(), "in.safetensors", tensors, None);
    let before = std::fs::read(&file).unwrap();
    let out = dir.path().join("out.safetensors");
    let mut all = vec!["resize", s(&file), "-o", s(&out)];
    all.extend_from_slice(args);
    let output = posgrid(&all);
    assert_eq!(std::fs::read(&file).unwrap(), before, "the input changed");
    Attempt {
        wrote: out.exists(),
        output,
    }
}

impl Attempt {
    /// Refused with exit `code`, the file and every one of `words` named, nothing written.
    fn refused(&self, code: i32, words: &[&str]) {
        let err = stderr(&self.output);
        assert_eq!(common::code(&self.output), code, "{err}");
        assert!(err.contains("in.safetensors"), "{err}");
        for w in words {
            assert!(err.contains(w), "{w}: {err}");
        }
        assert!(!self.wrote, "an output was written");
    }
}

fn small_table(dim: usize) -> common::T {
    floats(
        "pos_embed",
        Dtype::F32,
        &[1, 17, dim],
        &noise(17 * dim, 5, 0.1),
    )
}

/// A matrix named as a patch embedding with no inputs at all (`[D, 0]`, a shape the format
/// allows): refused as no kernel to resize (exit 4), naming it, never a crash.
#[test]
fn an_embedding_without_inputs_is_refused_not_a_crash() {
    let empty = floats("patch_embed.proj.weight", Dtype::F32, &[16, 0], &[]);
    attempt(
        &[empty, small_table(16)],
        &["--image", "40", "--new-patch", "10"],
    )
    .refused(4, &["patch_embed.proj.weight", "0 inputs"]);
}

/// A convolution kernel with zero-pixel patches (`[D, C, 0, 0]`, `[0, 0, C, D]` or a tubelet
/// kernel `[D, C, t, 0, 0]`) sets no patch size: sizing by image is refused as an unknown patch
/// (exit 4), never a division by zero; a new patch size finds no kernel to resize (exit 4).
#[test]
fn kernels_with_empty_patches_set_no_patch_size() {
    for shape in [&[16, 3, 0, 0][..], &[0, 0, 3, 16], &[16, 3, 2, 0, 0]] {
        let kernel = floats("patch_embed.proj.weight", Dtype::F32, shape, &[]);
        attempt(&[kernel, small_table(16)], &["--image", "40"])
            .refused(4, &["pos_embed", "patch size is unknown"]);
        let kernel = floats("patch_embed.proj.weight", Dtype::F32, shape, &[]);
        attempt(
            &[kernel, small_table(16)],
            &["--image", "40", "--new-patch", "10"],
        )
        .refused(4, &["--new-patch 10x10", "no patch-projection kernel"]);
    }
}

/// A smooth linear embedding `[D, 3·p·p]` flattened channel by channel (each channel's patch a
/// low-frequency cosine, as trained kernels are smooth; common practice), times `scale`.
fn smooth_embedding(dim: usize, p: usize, scale: f64) -> Vec<f64> {
    let mut v = Vec::with_capacity(dim * 3 * p * p);
    for d in 0..dim {
        for c in 0..3 {
            let (fy, fx) = (0.1 + 0.05 * (d % 4) as f64, 0.1 + 0.04 * c as f64);
            for y in 0..p {
                for x in 0..p {
                    v.push(scale * ((fy * y as f64).cos() + (fx * x as f64 + d as f64).sin()));
                }
            }
        }
    }
    v
}

/// NaN or infinity in a patch kernel cannot go through the pseudo-inverse, so `--allow-nonfinite`
/// cannot help: refused with exit 6 naming the values (not sent looking for a flattening order
/// the values were never going to tell), for a linear embedding with or without `--patch-order`
/// and for a convolution kernel with `--allow-nonfinite`.
#[test]
fn non_finite_patch_kernels_are_refused_for_what_they_hold() {
    for bad in [f64::NAN, f64::INFINITY] {
        let mut linear = smooth_embedding(16, 8, 0.1);
        linear[5] = bad;
        let embedding = || floats("patch_embed.proj.weight", Dtype::F32, &[16, 192], &linear);
        for extra in [&[][..], &["--patch-order", "cyx"], &["--allow-nonfinite"]] {
            let mut args = vec!["--image", "40", "--new-patch", "10"];
            args.extend_from_slice(extra);
            let run = attempt(&[embedding(), small_table(16)], &args);
            run.refused(6, &["patch_embed.proj.weight", "NaN or infinite"]);
            assert!(!stderr(&run.output).contains("--patch-order"), "{extra:?}");
            assert!(
                !stderr(&run.output).contains("--allow-nonfinite"),
                "{extra:?}"
            );
        }
        let conv = floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[16, 3, 8, 8],
            &linear,
        );
        let args = ["--image", "40", "--new-patch", "10", "--allow-nonfinite"];
        let run = attempt(&[conv, small_table(16)], &args);
        run.refused(6, &["patch_embed.proj.weight", "NaN or infinite"]);
        assert!(!stderr(&run.output).contains("--allow-nonfinite"));
    }
}

/// Values that do not tell the flattening order say why in words, never with a NaN roughness:
/// flat patches (a constant matrix). Values near the largest F64 still tell it (the roughness
/// is a ratio, computed without overflow), and a one-pixel patch (`[D, 3]`) is the same in
/// both orders, so it needs no flag.
#[test]
fn the_flattening_order_is_read_from_any_finite_values() {
    let flat = floats(
        "patch_embed.proj.weight",
        Dtype::F32,
        &[16, 192],
        &[0.5; 16 * 192],
    );
    let run = attempt(
        &[flat, small_table(16)],
        &["--image", "40", "--new-patch", "10"],
    );
    run.refused(4, &["patch_embed.proj.weight", "flat", "--patch-order"]);
    assert!(
        !stderr(&run.output).contains("NaN"),
        "{}",
        stderr(&run.output)
    );

    let huge = smooth_embedding(16, 8, 1e300);
    let huge = floats("patch_embed.proj.weight", Dtype::F64, &[16, 192], &huge);
    let run = attempt(
        &[huge, small_table(16)],
        &["--image", "64", "--new-patch", "16", "--dry-run"],
    );
    assert_eq!(code(&run.output), 0, "{}", stderr(&run.output));
    assert!(
        stderr(&run.output).contains("channel by channel (cyx)"),
        "{}",
        stderr(&run.output)
    );

    let pixel = floats(
        "patch_embed.proj.weight",
        Dtype::F32,
        &[16, 3],
        &noise(48, 9, 1.0),
    );
    let run = attempt(
        &[pixel, small_table(16)],
        &["--image", "8", "--new-patch", "2"],
    );
    assert_eq!(code(&run.output), 0, "{}", stderr(&run.output));
    assert!(run.wrote);
}

/// `--tensor` naming the tables but not the patch kernel would write tables for the new patch
/// beside a kernel that still projects old-size patches: refused (exit 4) naming the kernel,
/// as a new patch size without any kernel is. Naming the kernel too resizes both.
#[test]
fn a_new_patch_that_leaves_out_its_kernel_is_refused() {
    let kernel = || {
        floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[16, 3, 8, 8],
            &smooth_embedding(16, 8, 0.1),
        )
    };
    let args = [
        "--image",
        "50",
        "--new-patch",
        "10",
        "--tensor",
        "pos_embed",
    ];
    attempt(&[kernel(), small_table(16)], &args).refused(
        4,
        &["--new-patch 10x10", "patch_embed.proj.weight", "--tensor"],
    );
    let both = [&args[..], &["--tensor", "patch_embed.proj.weight"]].concat();
    let run = attempt(&[kernel(), small_table(16)], &both);
    assert_eq!(code(&run.output), 0, "{}", stderr(&run.output));
    assert!(run.wrote);
}

/// `--patch-order` where it decides nothing — no new patch size (scan, or resize without
/// `--new-patch`), or a convolution kernel whose shape gives its layout — is a warning saying
/// it is ignored, as `--window` on a file without windows is: a typo in a script should not
/// pass silently.
#[test]
fn a_patch_order_that_decides_nothing_is_a_warning() {
    let dir = tempfile::tempdir().unwrap();
    let conv = floats(
        "patch_embed.proj.weight",
        Dtype::F32,
        &[16, 3, 8, 8],
        &smooth_embedding(16, 8, 0.1),
    );
    let file = write(dir.path(), "in.safetensors", &[conv, small_table(16)], None);
    let out = dir.path().join("out.safetensors");
    for args in [
        &["scan", s(&file), "--patch-order", "yxc"][..],
        &[
            "resize",
            s(&file),
            "-o",
            s(&out),
            "--grid",
            "5",
            "--patch-order",
            "yxc",
            "--dry-run",
        ],
        &[
            "resize",
            s(&file),
            "-o",
            s(&out),
            "--image",
            "40",
            "--new-patch",
            "10",
            "--patch-order",
            "yxc",
            "--dry-run",
        ],
    ] {
        let o = posgrid(args);
        assert_eq!(code(&o), 0, "{}", stderr(&o));
        let warning = stderr(&o)
            .lines()
            .find(|l| l.contains("--patch-order"))
            .map(str::to_string);
        let warning = warning.unwrap_or_else(|| panic!("{args:?}: no warning"));
        assert!(warning.contains("ignored"), "{warning}");
    }
}

/// A kernel whose patches are larger than the resize takes (64 a side) is refused at planning,
/// before any value is computed, naming it and its patch — with an empty kernel of enormous
/// patches (`[0, 3, 2^32, 2^32]`, zero bytes), whose patch area does not fit 64 bits.
#[test]
fn kernels_of_patches_too_large_are_refused_at_planning() {
    use posgrid::plan::{build, Relative, Request, Target, DEFAULT_MEMORY_LIMIT};
    let dir = tempfile::tempdir().unwrap();
    let side = 1usize << 32;
    let header = format!(
        r#"{{"patch_embed.proj.weight":{{"dtype":"F32","shape":[0,3,{side},{side}],"data_offsets":[0,0]}}}}"#
    );
    let huge = crafted(dir.path(), "huge.safetensors", &header, &[]);
    let linear = write(
        dir.path(),
        "linear.safetensors",
        &[floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[2, 3 * 100 * 100],
            &smooth_embedding(2, 100, 0.1),
        )],
        None,
    );
    for (file, patch) in [(huge, format!("{side}x{side}")), (linear, "100x100".into())] {
        let ckpt = Checkpoint::open(&file).unwrap();
        let hints = posgrid::kinds::Hints {
            new_patch: Some((10, 10)),
            patch_order: Some(posgrid::kinds::patch::Flatten::Cyx),
            ..Default::default()
        };
        let found = posgrid::kinds::discover(&ckpt, &hints).unwrap();
        let request = Request {
            target: Target::Image(40, 40),
            tensors: Vec::new(),
            options: Default::default(),
            allow_nonfinite: false,
            memory_limit: DEFAULT_MEMORY_LIMIT,
            rebuild_sincos: false,
            window: None,
            frames: None,
            relative: Relative::Kernel,
            new_patch: Some((10, 10)),
        };
        let err = build(&ckpt, &found, &request).unwrap_err();
        assert_eq!(err.exit_code(), 6, "{err}");
        let message = err.to_string();
        assert!(message.contains("patch_embed.proj.weight"), "{message}");
        assert!(message.contains(&patch), "{message}");
    }
}
