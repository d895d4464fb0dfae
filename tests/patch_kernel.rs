//! Patch-projection kernels moved to a new patch size, checked against:
//! - fixtures/golden/patch_cases.safetensors (fixtures/golden/make_patch_golden.py): the resize
//!   matrix B built by torch's interpolate of every basis image (bilinear and bicubic,
//!   align_corners=False, antialias off and on, square and non-square), and numpy's
//!   `np.linalg.pinv(Bᵀ, rtol=max(M, N)·eps)` with the kernels it resizes;
//! - the defining properties of the pseudo-inverse method, computed here with B written out:
//!   `⟨x, w⟩ = ⟨Bx, ŵ⟩` when B has full column rank, the normal equations `B(Bᵀŵ − w) = 0`
//!   otherwise, and the four Penrose conditions for a rank-deficient B;
//! - the definition of B itself: the engine's 2-D resampling of each basis image.

mod common;

use common::golden::Golden;
use posgrid::rebuild::patch_kernel::{
    default_options, projector, rank, resize_kernels, resize_matrix, PatchKernelError,
    MAX_PATCH_SIDE,
};
use posgrid::resample::{resample, Antialias, Coords, Edges, Kernel, Options, ResampleError};
use posgrid::values::decode_ints;
use serde_json::Value;

const GOLDEN: &str = "fixtures/golden/patch_cases.safetensors";

type Sides = (usize, usize);

/// A stored tensor of integers, as indices.
fn ints(golden: &Golden, name: &str) -> Vec<usize> {
    let (bytes, t) = golden.raw(name);
    let values = decode_ints(t.dtype, &bytes).unwrap();
    values.into_iter().map(|v| v as usize).collect()
}

/// The case's B, dense row-major, from its compressed rows.
fn golden_matrix(golden: &Golden, case: &Case) -> Vec<f64> {
    let ptr = ints(golden, &format!("{}.b_ptr", case.name));
    let col = ints(golden, &format!("{}.b_col", case.name));
    let (val, _) = golden.read_f64(&format!("{}.b_val", case.name));
    let (rows, cols) = case.dims();
    assert_eq!(ptr.len(), rows + 1, "{}: row pointers", case.name);
    let mut b = vec![0.0; rows * cols];
    for r in 0..rows {
        for k in ptr[r]..ptr[r + 1] {
            b[r * cols + col[k]] = val[k];
        }
    }
    b
}

struct Case {
    name: String,
    from: Sides,
    to: Sides,
    opts: Options,
    rank: usize,
    projector: bool,
}

impl Case {
    fn of(v: &Value) -> Self {
        let sides = |key: &str| {
            let s = v[key].as_array().unwrap();
            (
                s[0].as_u64().unwrap() as usize,
                s[1].as_u64().unwrap() as usize,
            )
        };
        assert_eq!(v["align_corners"], false);
        let antialias = v["antialias"] == true;
        // The framework's bilinear and bicubic: half-pixel coordinates, a = -0.75 for bicubic
        // (the framework's documented value); border samples repeated, except that its
        // antialiased path drops taps outside the source and rescales the rest (as its own
        // output shows: 8 -> 6 starts with weights 0.7, 0.3).
        let opts = Options {
            kernel: match v["mode"].as_str().unwrap() {
                "bilinear" => Kernel::Bilinear,
                "bicubic" => Kernel::Bicubic,
                m => panic!("mode {m}"),
            },
            coords: Coords::HalfPixel,
            edges: if antialias {
                Edges::Renormalize
            } else {
                Edges::Clamp
            },
            antialias: if antialias {
                Antialias::On
            } else {
                Antialias::Off
            },
            cubic_a: -0.75,
        };
        Case {
            name: v["name"].as_str().unwrap().to_string(),
            from: sides("from"),
            to: sides("to"),
            opts,
            rank: v["rank"].as_u64().unwrap() as usize,
            projector: v["projector"] == true,
        }
    }

    /// B's shape: `[p'q', pq]`.
    fn dims(&self) -> (usize, usize) {
        (self.to.0 * self.to.1, self.from.0 * self.from.1)
    }
}

fn golden_cases() -> (Golden, Vec<Case>) {
    let golden = Golden::open(GOLDEN);
    let cases = golden.cases.iter().map(Case::of).collect();
    (golden, cases)
}

fn max_abs(v: &[f64]) -> f64 {
    v.iter().fold(0.0, |m, x| m.max(x.abs()))
}

/// The largest difference relative to the largest |reference|.
fn relative_error(got: &[f64], reference: &[f64]) -> f64 {
    assert_eq!(got.len(), reference.len());
    let worst = got
        .iter()
        .zip(reference)
        .fold(0.0f64, |m, (g, r)| m.max((g - r).abs()));
    worst / max_abs(reference).max(f64::MIN_POSITIVE)
}

#[test]
fn resize_matrix_matches_the_framework_interpolate() {
    let (golden, cases) = golden_cases();
    for case in &cases {
        let ours = resize_matrix(case.from, case.to, &case.opts).unwrap();
        let theirs = golden_matrix(&golden, case);
        let worst = ours
            .iter()
            .zip(&theirs)
            .fold(0.0f64, |m, (a, b)| m.max((a - b).abs()));
        assert!(worst <= 1e-6, "{}: B differs by {worst:e}", case.name);
        eprintln!("{}: B within {worst:.1e} of the framework's", case.name);
    }
    assert_eq!(cases.len(), 9);
}

#[test]
fn resized_kernels_match_numpy_pinv() {
    let (golden, cases) = golden_cases();
    for case in &cases {
        let w = golden.read_f64(&format!("{}.w", case.name)).0;
        let expected = golden.read_f64(&format!("{}.w_new", case.name)).0;
        let count = w.len() / case.dims().1;
        let got = resize_kernels(&w, count, case.from, case.to, &case.opts).unwrap();
        let err = relative_error(&got, &expected);
        assert!(err <= 1e-8, "{}: ŵ off by {err:e} relative", case.name);
        eprintln!("{}: ŵ within {err:.1e} of numpy", case.name);
    }
}

#[test]
fn projector_matches_numpy_pinv() {
    let (golden, cases) = golden_cases();
    let stored: Vec<&Case> = cases.iter().filter(|c| c.projector).collect();
    assert_eq!(stored.len(), 2);
    for case in stored {
        let expected = golden.read_f64(&format!("{}.projector", case.name)).0;
        let got = projector(case.from, case.to, &case.opts).unwrap();
        let err = relative_error(&got, &expected);
        assert!(
            err <= 1e-8,
            "{}: pinv(Bᵀ) off by {err:e} relative",
            case.name
        );
    }
}

#[test]
fn rank_matches_numpy_matrix_rank() {
    let (_, cases) = golden_cases();
    for case in &cases {
        let got = rank(case.from, case.to, &case.opts).unwrap();
        assert_eq!(got, case.rank, "{}", case.name);
    }
}

/// A small deterministic generator of values in [-1, 1) (splitmix64).
struct Values(u64);

impl Values {
    fn take(&mut self, n: usize) -> Vec<f64> {
        (0..n)
            .map(|_| {
                self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
                let mut z = self.0;
                z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
                z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
                z ^= z >> 31;
                (z >> 11) as f64 / (1u64 << 52) as f64 - 1.0
            })
            .collect()
    }
}

/// Row-major `[m, n]` times a vector of `n`.
fn times(a: &[f64], n: usize, x: &[f64]) -> Vec<f64> {
    a.chunks_exact(n)
        .map(|row| row.iter().zip(x).map(|(a, b)| a * b).sum())
        .collect()
}

/// `Aᵀ` times a vector, for row-major `A` of `n` columns.
fn times_transposed(a: &[f64], n: usize, y: &[f64]) -> Vec<f64> {
    let mut out = vec![0.0; n];
    for (row, &yi) in a.chunks_exact(n).zip(y) {
        out.iter_mut().zip(row).for_each(|(o, &r)| *o += r * yi);
    }
    out
}

fn dot(x: &[f64], y: &[f64]) -> f64 {
    x.iter().zip(y).map(|(a, b)| a * b).sum()
}

fn norm(x: &[f64]) -> f64 {
    dot(x, x).sqrt()
}

fn with_kernel(kernel: Kernel) -> Options {
    Options {
        kernel,
        ..default_options()
    }
}

/// Enlarging sizes (B has full column rank): square, non-square, one axis kept.
const ENLARGING: [(Sides, Sides); 5] = [
    ((14, 14), (16, 16)),
    ((16, 16), (32, 32)),
    ((8, 6), (10, 9)),
    ((8, 6), (8, 9)),
    ((7, 7), (8, 8)),
];

#[test]
fn every_patch_projects_as_before_when_enlarging() {
    let mut values = Values(1);
    for kernel in [
        Kernel::Bilinear,
        Kernel::Bicubic,
        Kernel::Nearest,
        Kernel::Lanczos3,
    ] {
        let opts = with_kernel(kernel);
        for (from, to) in ENLARGING {
            let n = from.0 * from.1;
            let b = resize_matrix(from, to, &opts).unwrap();
            let w = values.take(3 * n);
            let w_new = resize_kernels(&w, 3, from, to, &opts).unwrap();
            assert_eq!(rank(from, to, &opts).unwrap(), n, "{kernel} {from:?}");
            for (w, w_new) in w.chunks_exact(n).zip(w_new.chunks_exact(to.0 * to.1)) {
                for _ in 0..4 {
                    let x = values.take(n);
                    let before = dot(&x, w);
                    let after = dot(&times(&b, n, &x), w_new);
                    let scale = norm(&x) * norm(w);
                    assert!(
                        (before - after).abs() <= 1e-10 * scale,
                        "{kernel} {from:?} -> {to:?}: {before} vs {after}"
                    );
                }
            }
        }
    }
}

/// Shrinking and mixed sizes (B lacks full column rank).
const SHRINKING: [(Sides, Sides); 5] = [
    ((16, 16), (14, 14)),
    ((32, 32), (16, 16)),
    ((8, 8), (6, 6)),
    ((8, 6), (6, 9)),
    ((9, 9), (9, 4)),
];

#[test]
fn shrunk_kernels_solve_the_normal_equations() {
    let mut values = Values(2);
    for kernel in [Kernel::Bilinear, Kernel::Bicubic, Kernel::Area] {
        for antialias in [Antialias::Off, Antialias::On] {
            let opts = Options {
                antialias,
                ..with_kernel(kernel)
            };
            for (from, to) in SHRINKING {
                let n = from.0 * from.1;
                let b = resize_matrix(from, to, &opts).unwrap();
                let w = values.take(n);
                let w_new = resize_kernels(&w, 1, from, to, &opts).unwrap();
                // Residual r = Bᵀŵ − w; least squares means B·r = 0.
                let fitted = times_transposed(&b, n, &w_new);
                let residual: Vec<f64> = fitted.iter().zip(&w).map(|(f, w)| f - w).collect();
                let gradient = times(&b, n, &residual);
                assert!(
                    max_abs(&gradient) <= 1e-9 * norm(&w),
                    "{kernel} {antialias} {from:?} -> {to:?}: |B(Bᵀŵ − w)| = {:e}",
                    max_abs(&gradient)
                );
            }
        }
    }
}

/// `A·X` for row-major `A [m, k]`, `X [k, n]`.
fn matmul(a: &[f64], m: usize, k: usize, x: &[f64], n: usize) -> Vec<f64> {
    let mut out = vec![0.0; m * n];
    for i in 0..m {
        for j in 0..n {
            out[i * n + j] = (0..k).map(|l| a[i * k + l] * x[l * n + j]).sum();
        }
    }
    out
}

fn transposed(a: &[f64], rows: usize, cols: usize) -> Vec<f64> {
    (0..cols)
        .flat_map(|c| (0..rows).map(move |r| a[r * cols + c]))
        .collect()
}

fn assert_symmetric(a: &[f64], n: usize, what: &str) {
    let t = transposed(a, n, n);
    assert!(relative_error(&t, a) <= 1e-12, "{what} is not symmetric");
}

#[test]
fn rank_deficient_matrices_get_the_moore_penrose_inverse() {
    // Nearest shrinking drops whole source rows and columns; area of 6 -> 4 and a 9x9 -> 3x3
    // with bilinear are rank-deficient too. The four Penrose conditions define the inverse.
    let cases = [
        (Kernel::Nearest, (8, 8), (6, 6)),
        (Kernel::Nearest, (9, 5), (4, 7)),
        (Kernel::Area, (6, 6), (4, 4)),
        (Kernel::Bilinear, (9, 9), (3, 3)),
    ];
    for (kernel, from, to) in cases {
        let opts = Options {
            antialias: Antialias::Off,
            ..with_kernel(kernel)
        };
        let (rows, cols) = (to.0 * to.1, from.0 * from.1);
        let a = transposed(&resize_matrix(from, to, &opts).unwrap(), rows, cols); // Bᵀ [cols, rows]
        let p = projector(from, to, &opts).unwrap(); // [rows, cols]
        let ap = matmul(&a, cols, rows, &p, cols);
        let pa = matmul(&p, rows, cols, &a, rows);
        let what = format!("{kernel} {from:?} -> {to:?}");
        assert!(
            relative_error(&matmul(&ap, cols, cols, &a, rows), &a) <= 1e-12,
            "{what}: APA"
        );
        assert!(
            relative_error(&matmul(&pa, rows, rows, &p, cols), &p) <= 1e-12,
            "{what}: PAP"
        );
        assert_symmetric(&ap, cols, &format!("{what}: AP"));
        assert_symmetric(&pa, rows, &format!("{what}: PA"));
    }
    // Nearest 8 -> 6 keeps 6 of the 8 source rows and columns.
    let nearest = Options {
        kernel: Kernel::Nearest,
        ..default_options()
    };
    assert_eq!(rank((8, 8), (6, 6), &nearest).unwrap(), 36);
}

#[test]
fn the_same_size_is_the_identity() {
    let mut values = Values(3);
    for kernel in [Kernel::Bilinear, Kernel::Bicubic, Kernel::Nearest] {
        for antialias in [Antialias::Off, Antialias::On, Antialias::Auto] {
            let opts = Options {
                antialias,
                ..with_kernel(kernel)
            };
            for sides in [(1, 1), (14, 14), (16, 12), (32, 32)] {
                let n = sides.0 * sides.1;
                let w = values.take(4 * n);
                assert_eq!(resize_kernels(&w, 4, sides, sides, &opts).unwrap(), w);
                let p = projector(sides, sides, &opts).unwrap();
                let identity: Vec<f64> = (0..n * n)
                    .map(|i| f64::from(u8::from(i % (n + 1) == 0)))
                    .collect();
                assert_eq!(p, identity, "{kernel} {antialias} {sides:?}");
            }
        }
    }
}

#[test]
fn resize_matrix_is_the_engine_on_every_basis_image() {
    // The definition of B, written out: cell (i, j) of a [p, q, pq] grid holds the unit vector
    // e_(i·q + j); resampling it carries every basis image at once.
    let kernels = [
        Kernel::Bilinear,
        Kernel::Bicubic,
        Kernel::Lanczos3,
        Kernel::Area,
    ];
    for kernel in kernels {
        for edges in [Edges::Clamp, Edges::Renormalize] {
            let opts = Options {
                edges,
                ..with_kernel(kernel)
            };
            for (from, to) in [((5, 7), (9, 4)), ((12, 12), (7, 7)), ((3, 4), (6, 8))] {
                let n = from.0 * from.1;
                let identity: Vec<f64> = (0..n * n)
                    .map(|i| f64::from(u8::from(i % (n + 1) == 0)))
                    .collect();
                let direct = resample(&identity, from, n, to, &opts).unwrap();
                let ours = resize_matrix(from, to, &opts).unwrap();
                assert!(
                    relative_error(&ours, &direct) <= 1e-14,
                    "{kernel} {edges} {from:?} -> {to:?}"
                );
            }
        }
    }
}

#[test]
fn kernels_are_resized_one_by_one_in_order() {
    // count consecutive kernels give the same as each alone, in the same order.
    let mut values = Values(4);
    let (from, to) = ((6, 5), (7, 8));
    let opts = default_options();
    let w = values.take(5 * 30);
    let all = resize_kernels(&w, 5, from, to, &opts).unwrap();
    for (k, chunk) in w.chunks_exact(30).enumerate() {
        let one = resize_kernels(chunk, 1, from, to, &opts).unwrap();
        assert_eq!(one, all[k * 56..(k + 1) * 56]);
    }
    assert!(resize_kernels(&[], 0, from, to, &opts).unwrap().is_empty());
}

#[test]
fn bad_requests_are_refused_with_reasons() {
    let opts = default_options();
    let empty = resize_kernels(&[], 0, (0, 4), (4, 4), &opts).unwrap_err();
    assert!(matches!(empty, PatchKernelError::EmptyPatch { .. }));
    let too_large = MAX_PATCH_SIDE + 1;
    for (from, to) in [((too_large, 4), (4, 4)), ((4, 4), (4, too_large))] {
        let err = projector(from, to, &opts).unwrap_err();
        assert!(
            matches!(err, PatchKernelError::PatchTooLarge { .. }),
            "{err}"
        );
        assert!(err.to_string().contains("above 64"), "{err}");
        assert!(resize_matrix(from, to, &opts).is_err());
    }
    let short = resize_kernels(&[0.0; 15], 1, (4, 4), (5, 5), &opts).unwrap_err();
    assert_eq!(
        short.to_string(),
        "15 kernel values given, but 1 kernels of 4x4 need 16"
    );
    let huge = resize_kernels(&[0.0; 16], usize::MAX, (4, 4), (5, 5), &opts).unwrap_err();
    assert!(matches!(huge, PatchKernelError::LengthMismatch { .. }));
    let mut w = vec![0.5; 16];
    w[9] = f64::NAN;
    let nan = resize_kernels(&w, 1, (4, 4), (5, 5), &opts).unwrap_err();
    assert_eq!(nan.to_string(), "kernel value 9 is not finite (NaN)");
    let area_corners = Options {
        kernel: Kernel::Area,
        coords: Coords::AlignCorners,
        ..opts
    };
    let err = projector((4, 4), (2, 2), &area_corners).unwrap_err();
    assert_eq!(
        err,
        PatchKernelError::Resample(ResampleError::AreaNeedsHalfPixel)
    );
    let bad_a = Options {
        kernel: Kernel::Bicubic,
        cubic_a: f64::INFINITY,
        ..opts
    };
    assert!(rank((4, 4), (5, 5), &bad_a).is_err());
}

#[test]
#[ignore = "timing figures; run with --ignored --nocapture"]
fn timing_of_common_sizes() {
    // A ViT-Base kernel: 768 output channels by 3 input channels.
    let count = 768 * 3;
    let opts = default_options();
    let sizes = [
        ((32, 32), (16, 16)),
        ((16, 16), (32, 32)),
        ((14, 14), (16, 16)),
        ((64, 64), (48, 48)),
        ((48, 48), (64, 64)),
    ];
    for (from, to) in sizes {
        let w = Values(5).take(count * from.0 * from.1);
        let start = std::time::Instant::now();
        let p = projector(from, to, &opts).unwrap();
        let projector_time = start.elapsed();
        let start = std::time::Instant::now();
        let out = resize_kernels(&w, count, from, to, &opts).unwrap();
        let kernels_time = start.elapsed();
        eprintln!(
            "{from:?} -> {to:?}: projector {} values in {projector_time:?}, {count} kernels in {kernels_time:?}",
            p.len()
        );
        assert_eq!(out.len(), count * to.0 * to.1);
    }
}
