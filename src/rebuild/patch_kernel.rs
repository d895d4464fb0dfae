//! Patch-projection kernels moved to a new patch size by the published pseudo-inverse method.
//!
//! Resizing a `p×q` patch to `p'×q'` is linear: a matrix `B` of shape `[p'q', pq]` whose column
//! `i` is the `i`-th basis image (row-major) resized with the chosen options. A kernel `w`
//! (`p×q`, flattened row-major) becomes `ŵ = pinv(Bᵀ)·w`, so that `⟨Bx, ŵ⟩ = ⟨x, w⟩` for every
//! patch `x` when `B` has full column rank (enlarging), and `Bᵀŵ` is the least-squares
//! approximation of `w` otherwise (shrinking).
//!
//! The resampling engine is separable, so `B = B_h ⊗ B_w` (the Kronecker product of the
//! per-axis resize matrices, each made by resampling the identity with the engine). Hence the
//! singular value decomposition of `B` is the product of the two per-axis ones, each at most
//! 64×64: the singular values of `B` are the products `σ_a·τ_b`, and the Moore–Penrose
//! inverse drops those at or below `max(p'q', pq)·ε·σ_max` (numpy's default cut for `pinv`).
//! The small decompositions are one-sided Jacobi rotations in f64, written here: no linear
//! algebra dependency, and the decompositions take milliseconds even at 64×64.
//!
//! Layouts: [`resize_kernels`] takes `count` consecutive row-major `p×q` kernels. A
//! channels-first kernel `[D, C, p, q]` is `D·C` such kernels as it is, and so is a linear
//! embedding `[D, C·p·q]` flattened channel by channel. A channels-last kernel `[p, q, C, D]`
//! (or a linear embedding flattened pixel by pixel, `[D, p·q·C]`) is a `[p·q, C·D]` matrix
//! per kernel set that the caller transposes to `[C·D, p·q]` before and back after.

use crate::resample::{resample, Edges, Kernel, Options, ResampleError};
use crate::values::{try_filled, OutOfMemory};
use rayon::prelude::*;

/// The largest patch side accepted, on either axis, before and after.
pub const MAX_PATCH_SIDE: usize = 64;

/// Jacobi sweeps before giving up; the rotations converge quadratically, in well under 20.
const MAX_SWEEPS: usize = 60;

/// Why a kernel could not be resized.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum PatchKernelError {
    #[error("patch sides must be at least 1 (got {}x{} to {}x{})", from.0, from.1, to.0, to.1)]
    EmptyPatch {
        from: (usize, usize),
        to: (usize, usize),
    },
    #[error(
        "patch sides above {max} are refused (got {}x{} to {}x{})",
        from.0, from.1, to.0, to.1
    )]
    PatchTooLarge {
        from: (usize, usize),
        to: (usize, usize),
        max: usize,
    },
    #[error("{found} kernel values given, but {count} kernels of {p}x{q} need {expected}")]
    LengthMismatch {
        found: usize,
        expected: u128,
        count: usize,
        p: usize,
        q: usize,
    },
    #[error("kernel value {index} is not finite ({value})")]
    NonFinite { index: usize, value: f64 },
    #[error("{count} resized kernels of {p}x{q} need more values than memory can address")]
    OutputOverflow { count: usize, p: usize, q: usize },
    #[error("the resize matrix holds a value that is not finite")]
    NonFiniteMatrix,
    #[error("the resize matrix's decomposition did not settle within {0} sweeps")]
    NoConvergence(usize),
    #[error(transparent)]
    Resample(#[from] ResampleError),
    #[error(transparent)]
    OutOfMemory(#[from] OutOfMemory),
}

type Sides = (usize, usize);

/// The options a patch is resized with unless the caller says otherwise: bilinear, half-pixel,
/// antialiased when shrinking, with taps that fall outside the patch dropped and the rest
/// rescaled. That is the framework's bilinear interpolate, antialiased or not (its antialiased
/// path rescales at the borders; without antialias the two border rules give the same weights
/// for a two-tap kernel).
pub fn default_options() -> Options {
    Options {
        kernel: Kernel::Bilinear,
        edges: Edges::Renormalize,
        ..Options::default()
    }
}

/// `B`, row-major `[p'q', pq]`: column `i` is the `i`-th basis image of a `p×q` patch resized
/// to `p'×q'` with `opts`. Made as the Kronecker product of the per-axis matrices, which the
/// engine's separable passes make equal to resampling every basis image in 2-D.
pub fn resize_matrix(from: Sides, to: Sides, opts: &Options) -> Result<Vec<f64>, PatchKernelError> {
    check_sides(from, to)?;
    let down = axis_matrix(from.0, to.0, opts)?;
    let across = axis_matrix(from.1, to.1, opts)?;
    let (rows, cols) = (to.0 * to.1, from.0 * from.1);
    let mut b = try_filled(rows * cols, 0.0)?;
    for (r, row) in b.chunks_exact_mut(cols).enumerate() {
        let (oi, oj) = (r / to.1, r % to.1);
        for (c, value) in row.iter_mut().enumerate() {
            let (i, j) = (c / from.1, c % from.1);
            *value = down[oi * from.0 + i] * across[oj * from.1 + j];
        }
    }
    Ok(b)
}

/// `pinv(Bᵀ)`, row-major `[p'q', pq]`: the matrix that takes a flattened kernel to its
/// resized one.
pub fn projector(from: Sides, to: Sides, opts: &Options) -> Result<Vec<f64>, PatchKernelError> {
    let f = Factors::new(from, to, opts)?;
    let (rows, cols) = (to.0 * to.1, from.0 * from.1);
    // For each singular vector a of the first axis, the second axis's part of the product:
    // Q_a[j', j] = Σ_b U_w[j', b]·gain(a, b)·V_w[j, b].
    let per_a: Vec<Vec<f64>> = (0..f.h.k).map(|a| f.across_block(a)).collect();
    let mut p = try_filled(rows * cols, 0.0)?;
    p.par_chunks_exact_mut(cols)
        .enumerate()
        .for_each(|(r, row)| {
            let (oi, oj) = (r / to.1, r % to.1);
            for (i, cells) in row.chunks_exact_mut(from.1).enumerate() {
                for (a, block) in per_a.iter().enumerate() {
                    let c = f.h.u[oi * f.h.k + a] * f.h.v[i * f.h.k + a];
                    let q_row = &block[oj * from.1..(oj + 1) * from.1];
                    cells.iter_mut().zip(q_row).for_each(|(x, y)| *x += c * y);
                }
            }
        });
    Ok(p)
}

/// Resize `count` consecutive row-major `p×q` kernels to `p'×q'` (`ŵ = pinv(Bᵀ)·w` each),
/// returning `count` consecutive `p'×q'` kernels. See the module notes for other layouts.
pub fn resize_kernels(
    kernels: &[f64],
    count: usize,
    from: Sides,
    to: Sides,
    opts: &Options,
) -> Result<Vec<f64>, PatchKernelError> {
    check_sides(from, to)?;
    check_kernels(kernels, count, from)?;
    let out_len = count
        .checked_mul(to.0 * to.1)
        .ok_or(PatchKernelError::OutputOverflow {
            count,
            p: to.0,
            q: to.1,
        })?;
    let f = Factors::new(from, to, opts)?;
    let mut out = try_filled(out_len, 0.0)?;
    out.par_chunks_exact_mut(to.0 * to.1)
        .zip(kernels.par_chunks_exact(from.0 * from.1))
        .for_each(|(w_new, w)| f.apply(w, w_new));
    Ok(out)
}

/// The rank of `B` as the pseudo-inverse counts it: `p·q` means every patch projects exactly
/// as before; less means the resized kernels are least-squares approximations.
pub fn rank(from: Sides, to: Sides, opts: &Options) -> Result<usize, PatchKernelError> {
    let f = Factors::new(from, to, opts)?;
    Ok(f.gains.iter().filter(|&&g| g != 0.0).count())
}

fn check_sides(from: Sides, to: Sides) -> Result<(), PatchKernelError> {
    let sides = [from.0, from.1, to.0, to.1];
    if sides.contains(&0) {
        return Err(PatchKernelError::EmptyPatch { from, to });
    }
    if sides.iter().any(|&s| s > MAX_PATCH_SIDE) {
        return Err(PatchKernelError::PatchTooLarge {
            from,
            to,
            max: MAX_PATCH_SIDE,
        });
    }
    Ok(())
}

fn check_kernels(kernels: &[f64], count: usize, (p, q): Sides) -> Result<(), PatchKernelError> {
    let expected = count as u128 * (p * q) as u128;
    if kernels.len() as u128 != expected {
        return Err(PatchKernelError::LengthMismatch {
            found: kernels.len(),
            expected,
            count,
            p,
            q,
        });
    }
    match kernels.iter().position(|v| !v.is_finite()) {
        Some(index) => Err(PatchKernelError::NonFinite {
            index,
            value: kernels[index],
        }),
        None => Ok(()),
    }
}

/// One axis's resize matrix, row-major `[output, input]`: the identity (cell `i` holding the
/// `i`-th unit vector) resampled by the engine along that axis.
fn axis_matrix(input: usize, output: usize, opts: &Options) -> Result<Vec<f64>, PatchKernelError> {
    let mut identity = try_filled(input * input, 0.0)?;
    identity
        .iter_mut()
        .step_by(input + 1)
        .for_each(|v| *v = 1.0);
    Ok(resample(&identity, (input, 1), input, (output, 1), opts)?)
}

/// `B = U·diag(s)·Vᵀ` with `U` row-major `[rows, k]`, `V` row-major `[cols, k]`,
/// `k = min(rows, cols)`. Singular values are unordered; a column of `U` whose value is zero
/// is zero.
#[derive(Debug)]
struct Svd {
    u: Vec<f64>,
    s: Vec<f64>,
    v: Vec<f64>,
    k: usize,
}

/// The decompositions of both axes, with what every kernel reuses: `V_hᵀ`, `U_wᵀ` and the
/// gains `1/(σ_a·τ_b)`, zero for a product at or below the cut.
struct Factors {
    h: Svd,
    w: Svd,
    from: Sides,
    to: Sides,
    vh_t: Vec<f64>,
    uw_t: Vec<f64>,
    gains: Vec<f64>,
}

impl Factors {
    fn new(from: Sides, to: Sides, opts: &Options) -> Result<Self, PatchKernelError> {
        check_sides(from, to)?;
        let h = svd(&axis_matrix(from.0, to.0, opts)?, to.0, from.0)?;
        let w = svd(&axis_matrix(from.1, to.1, opts)?, to.1, from.1)?;
        let largest = |s: &[f64]| s.iter().fold(0.0f64, |m, &x| m.max(x));
        let sigma_max = largest(&h.s) * largest(&w.s);
        let dims = (to.0 * to.1).max(from.0 * from.1) as f64;
        let cutoff = dims * f64::EPSILON * sigma_max;
        let gains =
            h.s.iter()
                .flat_map(|&sa| w.s.iter().map(move |&tb| sa * tb))
                .map(|s| if s > cutoff { 1.0 / s } else { 0.0 })
                .collect();
        Ok(Factors {
            vh_t: transpose(&h.v, from.0, h.k),
            uw_t: transpose(&w.u, to.1, w.k),
            h,
            w,
            from,
            to,
            gains,
        })
    }

    fn gain(&self, a: usize, b: usize) -> f64 {
        self.gains[a * self.w.k + b]
    }

    /// `ŵ = U_h·(gains ∘ (V_hᵀ·W·V_w))·U_wᵀ` for one row-major `p×q` kernel `W`.
    fn apply(&self, w: &[f64], out: &mut [f64]) {
        let (kh, kw) = (self.h.k, self.w.k);
        let (p, q) = self.from;
        let (p2, q2) = self.to;
        let left = multiply(&self.vh_t, w, kh, p, q);
        let mut core = multiply(&left, &self.w.v, kh, q, kw);
        core.iter_mut().zip(&self.gains).for_each(|(x, g)| *x *= g);
        let grown = multiply(&self.h.u, &core, p2, kh, kw);
        out.copy_from_slice(&multiply(&grown, &self.uw_t, p2, kw, q2));
    }

    /// `Q_a = U_w·diag(gain(a, ·))·V_wᵀ`, row-major `[q', q]`.
    fn across_block(&self, a: usize) -> Vec<f64> {
        let w = &self.w;
        let (q, q2) = (self.from.1, self.to.1);
        let mut scaled = w.u.clone();
        for row in scaled.chunks_exact_mut(w.k) {
            row.iter_mut()
                .enumerate()
                .for_each(|(b, x)| *x *= self.gain(a, b));
        }
        multiply(&scaled, &transpose(&w.v, q, w.k), q2, w.k, q)
    }
}

/// Row-major `[m, n]` times `[n, l]`. Operands are at most 64×64 here.
fn multiply(a: &[f64], b: &[f64], m: usize, n: usize, l: usize) -> Vec<f64> {
    let mut c = vec![0.0; m * l];
    for (c_row, a_row) in c.chunks_exact_mut(l).zip(a.chunks_exact(n)) {
        for (&x, b_row) in a_row.iter().zip(b.chunks_exact(l)) {
            c_row.iter_mut().zip(b_row).for_each(|(c, &y)| *c += x * y);
        }
    }
    c
}

fn transpose(a: &[f64], rows: usize, cols: usize) -> Vec<f64> {
    (0..cols)
        .flat_map(|c| (0..rows).map(move |r| a[r * cols + c]))
        .collect()
}

/// The singular value decomposition of a row-major `[rows, cols]` matrix (one-sided Jacobi on
/// whichever of it and its transpose is tall).
fn svd(a: &[f64], rows: usize, cols: usize) -> Result<Svd, PatchKernelError> {
    if rows >= cols {
        return tall_svd(a, rows, cols);
    }
    let t = tall_svd(&transpose(a, rows, cols), cols, rows)?;
    Ok(Svd {
        u: t.v,
        s: t.s,
        v: t.u,
        k: t.k,
    })
}

/// One-sided Jacobi for `rows ≥ cols`: rotate pairs of columns until all are orthogonal (to
/// rounding), accumulating the rotations in `V`; the column norms are the singular values.
fn tall_svd(a: &[f64], rows: usize, cols: usize) -> Result<Svd, PatchKernelError> {
    if a.iter().any(|x| !x.is_finite()) {
        // The engine never makes one; refuse rather than rotate NaNs.
        return Err(PatchKernelError::NonFiniteMatrix);
    }
    let mut columns: Vec<Vec<f64>> = (0..cols)
        .map(|j| (0..rows).map(|i| a[i * cols + j]).collect())
        .collect();
    let mut v_columns: Vec<Vec<f64>> = (0..cols)
        .map(|j| (0..cols).map(|i| f64::from(u8::from(i == j))).collect())
        .collect();
    let tolerance = (rows as f64).sqrt() * f64::EPSILON;
    for _ in 0..MAX_SWEEPS {
        let mut rotated = false;
        for j in 1..cols {
            for i in 0..j {
                rotated |= orthogonalise(&mut columns, &mut v_columns, i, j, tolerance);
            }
        }
        if !rotated {
            return Ok(finish(columns, v_columns, rows, cols));
        }
    }
    Err(PatchKernelError::NoConvergence(MAX_SWEEPS))
}

/// Rotate columns `i < j` (and the same columns of `V`) so they become orthogonal; false when
/// they already are, relative to `tolerance`.
fn orthogonalise(
    columns: &mut [Vec<f64>],
    v_columns: &mut [Vec<f64>],
    i: usize,
    j: usize,
    tolerance: f64,
) -> bool {
    let (x, y) = pair(columns, i, j);
    let alpha = dot(x, x);
    let beta = dot(y, y);
    let gamma = dot(x, y);
    if gamma == 0.0 || gamma.abs() <= tolerance * (alpha * beta).sqrt() {
        return false;
    }
    // The rotation angle that zeroes the off-diagonal of the 2×2 Gram matrix.
    let zeta = (beta - alpha) / (2.0 * gamma);
    let t = zeta.signum() / (zeta.abs() + 1.0f64.hypot(zeta));
    let c = 1.0 / 1.0f64.hypot(t);
    let s = c * t;
    rotate(x, y, c, s);
    let (vx, vy) = pair(v_columns, i, j);
    rotate(vx, vy, c, s);
    true
}

fn pair(columns: &mut [Vec<f64>], i: usize, j: usize) -> (&mut [f64], &mut [f64]) {
    let (left, right) = columns.split_at_mut(j);
    (&mut left[i], &mut right[0])
}

fn rotate(x: &mut [f64], y: &mut [f64], c: f64, s: f64) {
    for (a, b) in x.iter_mut().zip(y.iter_mut()) {
        let (xa, yb) = (*a, *b);
        *a = c * xa - s * yb;
        *b = s * xa + c * yb;
    }
}

fn dot(x: &[f64], y: &[f64]) -> f64 {
    x.iter().zip(y).map(|(a, b)| a * b).sum()
}

/// Column norms become the singular values, normalised columns the left vectors.
fn finish(columns: Vec<Vec<f64>>, v_columns: Vec<Vec<f64>>, rows: usize, cols: usize) -> Svd {
    let s: Vec<f64> = columns.iter().map(|c| dot(c, c).sqrt()).collect();
    let mut u = vec![0.0; rows * cols];
    let mut v = vec![0.0; cols * cols];
    for (j, (column, &norm)) in columns.iter().zip(&s).enumerate() {
        if norm > 0.0 {
            column
                .iter()
                .enumerate()
                .for_each(|(i, x)| u[i * cols + j] = x / norm);
        }
        v_columns[j]
            .iter()
            .enumerate()
            .for_each(|(i, x)| v[i * cols + j] = *x);
    }
    Svd { u, s, v, k: cols }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `U·diag(s)·Vᵀ`, written out.
    fn rebuilt(svd: &Svd, rows: usize, cols: usize) -> Vec<f64> {
        let mut a = vec![0.0; rows * cols];
        for r in 0..rows {
            for c in 0..cols {
                a[r * cols + c] = (0..svd.k)
                    .map(|k| svd.u[r * svd.k + k] * svd.s[k] * svd.v[c * svd.k + k])
                    .sum();
            }
        }
        a
    }

    #[test]
    fn decomposition_rebuilds_tall_wide_and_singular_matrices() {
        let tall: Vec<f64> = (0..12).map(|i| ((i * 7 % 5) as f64) - 1.5).collect();
        // Rank 1: every row a multiple of the first.
        let singular = [1.0, 2.0, 3.0, 2.0, 4.0, 6.0];
        for (a, rows, cols) in [(&tall[..], 4, 3), (&tall[..], 3, 4), (&singular[..], 2, 3)] {
            let d = svd(a, rows, cols).unwrap();
            let back = rebuilt(&d, rows, cols);
            for (x, y) in a.iter().zip(&back) {
                assert!((x - y).abs() < 1e-13, "{x} vs {y}");
            }
        }
    }

    #[test]
    fn the_identity_decomposes_without_rotation() {
        let d = svd(&[1.0, 0.0, 0.0, 1.0], 2, 2).unwrap();
        assert_eq!(d.s, [1.0, 1.0]);
        assert_eq!(d.u, [1.0, 0.0, 0.0, 1.0]);
        assert_eq!(d.v, [1.0, 0.0, 0.0, 1.0]);
    }

    #[test]
    fn non_finite_matrices_are_refused() {
        assert!(svd(&[f64::NAN, 1.0], 2, 1).is_err());
    }
}
