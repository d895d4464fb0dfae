//! The fixed 2-D rotary frequency buffers (the published construction).
//!
//! Per axis, a grid of side `G` has positions `t_i = i/G·L` (`L` the pre-training side, so the
//! positions keep their range when the grid changes) and frequencies `f_k = θ^(−2k/d)` for
//! `k < d/2`, each used twice in a row (`f0 f0 f1 f1 …`, width `d`). Grid cell `(i, j)`, taken
//! row-major, gets the angle row `[t_i·f, t_j·f]` of width `2d`; the buffers hold its cosine
//! and its sine, shape `[G², 2d]`.
//!
//! Recognising a buffer reads the angles of cell `(0, 1)` (whose column half holds `L/G·f_k`),
//! fits `L/G` and `θ` to their logarithms (weighted by how precisely each angle can be read
//! back), refines the fit with cell `(0, G−1)`, snaps both to integers when within 1e-6, and
//! then checks every value. When the estimate does not fit (its last digits carry the values'
//! noise), or the values are stored so coarsely (F16, BF16) that they cannot pin those digits,
//! θ and L rounded to fewer significant digits (within 1% of the estimate, roundest first) are
//! tried: parameters that fit are the construction within the tolerance.
//!
//! Angles of cell `(0, 1)` must be readable without ambiguity: at most π from a cosine buffer or from both buffers, at most π/2 from a sine buffer alone (that is,
//! `L/G` within those bounds); past them a buffer is usually reported as not fitting. Only a
//! buffer with very little structure — a 2×2 or 3×3 grid, or two frequencies per axis — can
//! then match other parameters that reproduce it exactly at this grid (an alias); the sizes
//! of released buffers leave no such room.

use super::{check_size, RebuildError};
use crate::values::try_with_capacity;
use std::f64::consts::{PI, TAU};

/// The parameters of the construction.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RotaryParams {
    /// Frequency base θ (commonly 10000).
    pub theta: f64,
    /// Pre-training grid side `L`: positions span `[0, L)` whatever the grid.
    pub pretrain_side: f64,
    /// Per-axis width `d` (even); rows are `2d` wide.
    pub axis_dim: usize,
}

/// Which of the two buffers a value list holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Which {
    Cos,
    Sin,
}

impl RotaryParams {
    fn check(&self) -> Result<(), RebuildError> {
        if self.axis_dim < 2 || self.axis_dim % 2 != 0 {
            return Err(RebuildError::BadAxisDim(self.axis_dim));
        }
        for (name, value) in [
            ("theta", self.theta),
            ("pre-training side", self.pretrain_side),
        ] {
            if !(value.is_finite() && value > 0.0) {
                return Err(RebuildError::BadRotaryParam { name, value });
            }
        }
        Ok(())
    }

    /// `f_k = θ^(−2k/d)` for `k < d/2`.
    fn frequencies(&self) -> Vec<f64> {
        let d = self.axis_dim as f64;
        (0..self.axis_dim / 2)
            .map(|k| self.theta.powf(-((2 * k) as f64) / d))
            .collect()
    }

    /// `t_i = i/G·L` for `i < G`.
    fn positions(&self, grid: usize) -> Vec<f64> {
        (0..grid)
            .map(|i| i as f64 / grid as f64 * self.pretrain_side)
            .collect()
    }
}

/// The angles of one buffer, computed on demand from per-axis positions and frequencies.
struct Angles {
    grid: usize,
    axis_dim: usize,
    positions: Vec<f64>,
    frequencies: Vec<f64>,
}

impl Angles {
    fn new(grid: usize, params: &RotaryParams) -> Self {
        Angles {
            grid,
            axis_dim: params.axis_dim,
            positions: params.positions(grid),
            frequencies: params.frequencies(),
        }
    }

    /// The angle of column `col` of the row of grid cell `cell`.
    fn at(&self, cell: usize, col: usize) -> f64 {
        let (i, j) = (cell / self.grid, cell % self.grid);
        let pos = if col < self.axis_dim { i } else { j };
        self.positions[pos] * self.frequencies[(col % self.axis_dim) / 2]
    }
}

/// Build the cosine and sine buffers for a `grid × grid` grid, each `[grid², 2d]` row-major.
/// Refused when the two together would hold more than `max_elements` (or
/// [`super::HARD_ELEMENT_LIMIT`]) values.
pub fn build(
    grid: usize,
    params: &RotaryParams,
    max_elements: usize,
) -> Result<(Vec<f64>, Vec<f64>), RebuildError> {
    params.check()?;
    if grid == 0 {
        return Err(RebuildError::EmptyGrid);
    }
    let len = check_size(&[grid, grid, params.axis_dim, 2], usize::MAX)?;
    check_size(&[len, 2], max_elements)?;
    let angles = Angles::new(grid, params);
    let width = 2 * params.axis_dim;
    let mut cos = try_with_capacity(len)?;
    let mut sin = try_with_capacity(len)?;
    for cell in 0..grid * grid {
        for col in 0..width {
            let (s, c) = angles.at(cell, col).sin_cos();
            cos.push(c);
            sin.push(s);
        }
    }
    Ok((cos, sin))
}

/// Whether `values` (`[rows, width]`) is the `which` buffer of `params` within `tol`.
pub fn fits(
    values: &[f64],
    rows: usize,
    width: usize,
    which: Which,
    params: &RotaryParams,
    tol: f64,
) -> bool {
    let Some(grid) = grid_of(values.len(), rows, width) else {
        return false;
    };
    let width_fits = params.axis_dim.checked_mul(2) == Some(width);
    if params.check().is_err() || !width_fits || tol.is_nan() || tol < 0.0 {
        return false;
    }
    let angles = Angles::new(grid, params);
    let cell_fits = |cell: usize| {
        let row = &values[cell * width..][..width];
        row.iter().enumerate().all(|(col, &v)| {
            let a = angles.at(cell, col);
            let expected = match which {
                Which::Cos => a.cos(),
                Which::Sin => a.sin(),
            };
            (v - expected).abs() <= tol
        })
    };
    // The far cells first: their angles are the largest, so parameters that are slightly off
    // fail there at once, and trying several candidates costs little.
    let far = [grid - 1, grid * (grid - 1), rows - 1];
    far.into_iter().all(cell_fits) && (0..rows).all(cell_fits)
}

/// When integer θ and L near the estimate are taken instead of it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum RoundParameters {
    /// Only when the estimate itself does not fit (its last digits carry the values' noise).
    IfEstimateFails,
    /// Whenever they fit: for values stored so coarsely (F16, BF16) that the estimate cannot
    /// pin the last digits, and the model's own round parameters fit as well.
    WhenTheyFit,
}

/// The parameters whose `which` buffer `values` (`[rows, width]`) is, within `tol` (the
/// caller adds the rounding of the stored dtype), or `None` when it fits no such buffer.
pub fn recognise(
    values: &[f64],
    rows: usize,
    width: usize,
    which: Which,
    tol: f64,
) -> Option<RotaryParams> {
    recognise_rounding(
        values,
        rows,
        width,
        which,
        tol,
        RoundParameters::IfEstimateFails,
    )
}

/// As [`recognise`], choosing when round parameters are taken.
pub fn recognise_rounding(
    values: &[f64],
    rows: usize,
    width: usize,
    which: Which,
    tol: f64,
    round: RoundParameters,
) -> Option<RotaryParams> {
    let grid = grid_of(values.len(), rows, width)?;
    let read = |index: usize| match which {
        Which::Cos => Reading::Cos(values[index]),
        Which::Sin => Reading::Sin(values[index]),
    };
    let params = estimate(grid, width, read)?;
    settle(params, round, |p| fits(values, rows, width, which, p, tol))
}

/// As [`recognise`], with both buffers at hand (angles read back with `atan2`).
pub fn recognise_pair(
    cos: &[f64],
    sin: &[f64],
    rows: usize,
    width: usize,
    tol: f64,
) -> Option<RotaryParams> {
    recognise_pair_rounding(cos, sin, rows, width, tol, RoundParameters::IfEstimateFails)
}

/// As [`recognise_pair`], choosing when round parameters are taken.
pub fn recognise_pair_rounding(
    cos: &[f64],
    sin: &[f64],
    rows: usize,
    width: usize,
    tol: f64,
    round: RoundParameters,
) -> Option<RotaryParams> {
    let grid = grid_of(cos.len(), rows, width)?;
    if sin.len() != cos.len() {
        return None;
    }
    let params = estimate(grid, width, |index| Reading::Both(cos[index], sin[index]))?;
    settle(params, round, |p| {
        fits(cos, rows, width, Which::Cos, p, tol) && fits(sin, rows, width, Which::Sin, p, tol)
    })
}

/// The estimate or, as `round` says, round θ and L near it — whichever fits the values.
/// Round parameters that fit are the construction within the tolerance, so taking them is no
/// guess; they are only sought within 1% of the estimate, the roundest first.
fn settle(
    estimate: RotaryParams,
    round: RoundParameters,
    fits: impl Fn(&RotaryParams) -> bool,
) -> Option<RotaryParams> {
    let estimate_fits = fits(&estimate);
    if estimate_fits && round == RoundParameters::IfEstimateFails {
        return Some(estimate);
    }
    let rounded = round_candidates(&estimate).into_iter().find(|p| fits(p));
    rounded.or(estimate_fits.then_some(estimate))
}

/// θ and L rounded to 1 to 6 significant digits (each within 1% of the estimate, or kept as
/// estimated), fewest digits first, the estimate itself left out.
fn round_candidates(p: &RotaryParams) -> Vec<RotaryParams> {
    let with_estimate = |v: f64| {
        let mut list = round_values(v);
        list.push((v, usize::MAX / 4));
        list
    };
    let mut pairs = Vec::new();
    for (theta, a) in with_estimate(p.theta) {
        for &(side, b) in &with_estimate(p.pretrain_side) {
            let candidate = RotaryParams {
                theta,
                pretrain_side: side,
                axis_dim: p.axis_dim,
            };
            if candidate != *p {
                pairs.push((a + b, candidate));
            }
        }
    }
    pairs.sort_by_key(|(digits, _)| *digits);
    pairs.into_iter().map(|(_, c)| c).collect()
}

/// `v` rounded to 1 to 6 significant digits, within 1% of `v`, with the digits used.
fn round_values(v: f64) -> Vec<(f64, usize)> {
    let mut out: Vec<(f64, usize)> = Vec::new();
    if !(v.is_finite() && v > 0.0) {
        return out;
    }
    let magnitude = v.log10().floor() as i32;
    for digits in 1..=6 {
        // Scaled by an exact power of ten, so 16 comes back as 16, not 16.000000000000004.
        let exponent = digits - 1 - magnitude;
        let r = if exponent >= 0 {
            let scale = 10f64.powi(exponent);
            (v * scale).round() / scale
        } else {
            let step = 10f64.powi(-exponent);
            (v / step).round() * step
        };
        let close = r > 0.0 && ((v - r) / v).abs() <= 0.01;
        if close && !out.iter().any(|(x, _)| *x == r) {
            out.push((r, digits as usize));
        }
    }
    out
}

/// The grid side of a `[rows, width]` buffer of `len` values: rows must be a square of at
/// least 2×2 and the width a multiple of 4 with at least two frequencies per axis.
fn grid_of(len: usize, rows: usize, width: usize) -> Option<usize> {
    if rows.checked_mul(width)? != len || width < 8 || width % 4 != 0 {
        return None;
    }
    let grid = rows.isqrt();
    (grid >= 2 && grid * grid == rows).then_some(grid)
}

/// One stored value (or pair) read back as an angle.
#[derive(Clone, Copy)]
enum Reading {
    Both(f64, f64),
    Cos(f64),
    Sin(f64),
}

impl Reading {
    /// The angle in the range the inverse function returns.
    fn principal(self) -> f64 {
        match self {
            Reading::Both(c, s) => s.atan2(c),
            Reading::Cos(c) => c.clamp(-1.0, 1.0).acos(),
            Reading::Sin(s) => s.clamp(-1.0, 1.0).asin(),
        }
    }

    /// The angle this reading allows that lies nearest `predicted`.
    fn nearest(self, predicted: f64) -> f64 {
        let p = self.principal();
        let wrap = |base: f64| base + TAU * ((predicted - base) / TAU).round();
        let bases = match self {
            Reading::Both(..) => [p, p],
            Reading::Cos(_) => [p, -p],
            Reading::Sin(_) => [p, PI - p],
        };
        let (a, b) = (wrap(bases[0]), wrap(bases[1]));
        if (a - predicted).abs() <= (b - predicted).abs() {
            a
        } else {
            b
        }
    }

    /// How much the logarithm of `angle` read this way can be trusted: the inverse square of
    /// its error for a fixed error in the stored values (cos and sin lose precision where
    /// they are flat).
    fn weight(self, angle: f64) -> f64 {
        let steepness = match self {
            Reading::Both(..) => 1.0,
            Reading::Cos(_) => angle.sin(),
            Reading::Sin(_) => angle.cos(),
        };
        (angle * steepness).powi(2)
    }
}

/// Weighted least-squares line through `(k, log angle)` points.
#[derive(Default)]
struct LineFit {
    sw: f64,
    sx: f64,
    sy: f64,
    sxx: f64,
    sxy: f64,
    points: usize,
}

impl LineFit {
    fn add(&mut self, k: f64, angle: f64, weight: f64) {
        if !(angle > 0.0 && weight > 0.0 && angle.is_finite() && weight.is_finite()) {
            return;
        }
        let y = angle.ln();
        self.sw += weight;
        self.sx += weight * k;
        self.sy += weight * y;
        self.sxx += weight * k * k;
        self.sxy += weight * k * y;
        self.points += 1;
    }

    /// `(intercept, slope)`, when at least two points pin a line.
    fn line(&self) -> Option<(f64, f64)> {
        let det = self.sw * self.sxx - self.sx * self.sx;
        if self.points < 2 || det.is_nan() || det <= 0.0 {
            return None;
        }
        let slope = (self.sw * self.sxy - self.sx * self.sy) / det;
        let intercept = (self.sy - slope * self.sx) / self.sw;
        (slope.is_finite() && intercept.is_finite()).then_some((intercept, slope))
    }
}

/// Estimate θ and L from the column-axis half of cells `(0, 1)` and `(0, G−1)`, whose angles
/// are `j·(L/G)·θ^(−k/K)` (`K = d/2`): their logarithms lie on a line in `k`.
fn estimate(grid: usize, width: usize, read: impl Fn(usize) -> Reading) -> Option<RotaryParams> {
    let d = width / 2;
    let half = d / 2;
    let column_half = |cell: usize, k: usize| read(cell * width + d + 2 * k);
    let mut fit = LineFit::default();
    for k in 0..half {
        let reading = column_half(1, k);
        let angle = reading.principal();
        fit.add(k as f64, angle, reading.weight(angle));
    }
    let far = (grid - 1) as f64;
    let (intercept, slope) = fit.line()?;
    for k in (0..half).filter(|_| grid > 2) {
        let reading = column_half(grid - 1, k);
        let angle = reading.nearest(far * (intercept + slope * k as f64).exp());
        fit.add(k as f64, angle / far, reading.weight(angle));
    }
    let (intercept, slope) = fit.line()?;
    let theta = snap((-slope * half as f64).exp());
    let pretrain_side = snap(intercept.exp() * grid as f64);
    let params = RotaryParams {
        theta,
        pretrain_side,
        axis_dim: d,
    };
    params.check().ok().map(|_| params)
}

/// The nearest integer when within 1e-6 (relative), else the value itself.
fn snap(v: f64) -> f64 {
    let r = v.round();
    if r != 0.0 && ((v - r) / r).abs() <= 1e-6 {
        r
    } else {
        v
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const PARAMS: RotaryParams = RotaryParams {
        theta: 10000.0,
        pretrain_side: 16.0,
        axis_dim: 8,
    };

    #[test]
    fn the_first_cell_is_angle_zero_and_the_second_reads_l_over_g() {
        let (cos, sin) = build(4, &PARAMS, 1 << 20).unwrap();
        assert!(cos[..16].iter().all(|&c| c == 1.0));
        assert!(sin[..16].iter().all(|&s| s == 0.0));
        // Cell (0, 1): row half zero, column half (16/4)·θ^(−2k/8), pairwise.
        assert_eq!(sin[16 + 8], 4.0f64.sin());
        assert_eq!(sin[16 + 9], 4.0f64.sin());
        assert!((sin[16 + 10] - (0.4f64).sin()).abs() < 1e-15);
    }

    #[test]
    fn bad_requests_are_errors() {
        let odd = RotaryParams {
            axis_dim: 7,
            ..PARAMS
        };
        assert!(matches!(
            build(4, &odd, 1 << 20),
            Err(RebuildError::BadAxisDim(7))
        ));
        let nan = RotaryParams {
            theta: f64::NAN,
            ..PARAMS
        };
        assert!(build(4, &nan, 1 << 20).is_err());
        let negative = RotaryParams {
            pretrain_side: -1.0,
            ..PARAMS
        };
        assert!(build(4, &negative, 1 << 20).is_err());
        assert!(matches!(
            build(0, &PARAMS, 1 << 20),
            Err(RebuildError::EmptyGrid)
        ));
        assert!(matches!(
            build(4, &PARAMS, 511),
            Err(RebuildError::TooLarge { .. })
        ));
        assert!(build(usize::MAX, &PARAMS, usize::MAX).is_err());
    }

    #[test]
    fn shapes_that_cannot_hold_the_construction_are_not_recognised() {
        assert!(recognise(&[1.0; 16], 4, 4, Which::Cos, 1e-4).is_none());
        assert!(recognise(&[1.0; 24], 3, 8, Which::Cos, 1e-4).is_none());
        assert!(recognise(&[1.0; 8], 1, 8, Which::Cos, 1e-4).is_none());
        assert!(recognise(&[], usize::MAX, 8, Which::Sin, 1e-4).is_none());
        assert!(recognise_pair(&[1.0; 32], &[0.0; 16], 4, 8, 1e-4).is_none());
    }
}
