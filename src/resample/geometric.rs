//! Geometric-progression resampling of a relative table (the method BEiT-style fine-tuning
//! uses when the window of a relative table grows).
//!
//! A relative table of side `s = 2W−1` holds one value per offset `−(W−1) … W−1`. To reach the
//! side `t = 2W'−1`, the source offsets are not stretched evenly: they are laid out so that the
//! step from one to the next grows by a constant ratio `q` away from the centre — `1, 1+q,
//! 1+q+q², …` — with `q` chosen so that the outermost source offset lands on the outermost
//! target offset `t//2`. Offsets near zero, where a relative bias varies the most, keep nearly
//! their old spacing; the far ones spread out. The target offsets are the integers
//! `−(t//2) … t//2`, and every channel is read off the interpolating bicubic spline through the
//! source grid (not-a-knot ends), one axis at a time.
//!
//! The ratio is found by bisection on `[1.01, 1.5]` when enlarging (the published bracket); a
//! shrinking table takes the mirrored bracket `[1/1.5, 1/1.01]`, so the far offsets close up
//! instead. A side the bracket cannot reach is an error, never a silent compromise.

use super::{apply, AxisWeights};
use crate::values::{try_collect, try_with_capacity, OutOfMemory};

/// The bracket searched for the ratio when the table grows.
pub const GROWING_BRACKET: (f64, f64) = (1.01, 1.5);
/// The bracket searched when the table shrinks: the reciprocals of [`GROWING_BRACKET`].
pub const SHRINKING_BRACKET: (f64, f64) = (1.0 / 1.5, 1.0 / 1.01);
/// Bisection stops once the bracket is narrower than this.
pub const RATIO_PRECISION: f64 = 1e-6;
/// No output is ever larger than this many elements, whatever limit the caller gives.
pub const HARD_ELEMENT_LIMIT: usize = 1 << 31;

/// Why a geometric resampling was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum GeometricError {
    #[error("relative table sides must be odd (2W-1) and at least 1 (got {0})")]
    BadSide(usize),
    #[error(
        "no ratio in [{low}, {high}] takes a side-{source_side} table to side {target_side}: \
         the outermost offset cannot be placed"
    )]
    EdgeOutOfReach {
        source_side: usize,
        target_side: usize,
        low: f64,
        high: f64,
    },
    #[error(
        "table holds {found} values but a {side}x{side} grid of width {channels} needs {expected}"
    )]
    LengthMismatch {
        found: usize,
        expected: u128,
        side: usize,
        channels: usize,
    },
    #[error("spline nodes must be at least 4, finite and strictly increasing")]
    BadNodes,
    #[error("evaluation points must be finite")]
    BadPoints,
    #[error("the result would hold {needed} elements, over the limit of {limit}")]
    TooLarge { needed: u128, limit: usize },
    #[error(transparent)]
    OutOfMemory(#[from] OutOfMemory),
}

/// What a geometric resampling does, for reports: the ratio and both axes' coordinates.
#[derive(Debug, Clone, PartialEq)]
pub struct GeometricPlan {
    pub ratio: f64,
    /// Where the `s` source rows sit, symmetric about 0.
    pub source: Vec<f64>,
    /// Where the `t` target rows are read: the integers `−(t//2) … t//2`.
    pub target: Vec<f64>,
}

fn check_side(side: usize) -> Result<(), GeometricError> {
    if side % 2 == 0 {
        return Err(GeometricError::BadSide(side));
    }
    Ok(())
}

fn check_size(factors: &[usize], limit: usize) -> Result<usize, GeometricError> {
    let needed = factors
        .iter()
        .try_fold(1u128, |acc, &f| acc.checked_mul(f as u128))
        .unwrap_or(u128::MAX);
    let limit = limit.min(HARD_ELEMENT_LIMIT);
    if needed > limit as u128 {
        return Err(GeometricError::TooLarge { needed, limit });
    }
    Ok(needed as usize)
}

/// `1 + q + … + q^(terms−1)`: where the outermost offset lands for ratio `q`.
fn outermost(q: f64, terms: usize) -> f64 {
    (1.0 - q.powf(terms as f64)) / (1.0 - q)
}

/// The ratio that takes a side-`source_side` table to side `target_side` (both odd): 1 for
/// equal sides, else the last midpoint of the bisection.
pub fn ratio(source_side: usize, target_side: usize) -> Result<f64, GeometricError> {
    check_side(source_side)?;
    check_side(target_side)?;
    let (terms, reach) = (source_side / 2, target_side / 2);
    if terms == reach {
        return Ok(1.0);
    }
    let (low, high) = if reach > terms {
        GROWING_BRACKET
    } else {
        SHRINKING_BRACKET
    };
    let reach = reach as f64;
    if !(outermost(low, terms) <= reach && reach <= outermost(high, terms)) {
        return Err(GeometricError::EdgeOutOfReach {
            source_side,
            target_side,
            low,
            high,
        });
    }
    let (mut left, mut right, mut mid) = (low, high, (low + high) / 2.0);
    while right - left > RATIO_PRECISION {
        mid = (left + right) / 2.0;
        if outermost(mid, terms) > reach {
            right = mid;
        } else {
            left = mid;
        }
    }
    Ok(mid)
}

/// The `side` source coordinates for `ratio`: offsets `d_0 = 1`, `d_{i+1} = d_i + q^(i+1)`,
/// mirrored about 0.
pub fn source_coordinates(side: usize, ratio: f64) -> Result<Vec<f64>, GeometricError> {
    check_side(side)?;
    let half = side / 2;
    let mut offsets = try_with_capacity(half)?;
    let mut current = 1.0;
    for i in 0..half {
        offsets.push(current);
        current += ratio.powf((i + 1) as f64);
    }
    let mirrored = offsets.iter().rev().map(|d| -d);
    let all = mirrored
        .chain(std::iter::once(0.0))
        .chain(offsets.iter().copied());
    Ok(try_collect(side, all)?)
}

/// The `side` target coordinates `−(side//2) … side//2`.
pub fn target_coordinates(side: usize) -> Result<Vec<f64>, GeometricError> {
    check_side(side)?;
    let half = (side / 2) as f64;
    Ok(try_collect(side, (0..side).map(|i| i as f64 - half))?)
}

/// The ratio and coordinates of a resampling from `source_side` to `target_side`, refused
/// when the coordinates would exceed `max_elements` (or [`HARD_ELEMENT_LIMIT`]).
pub fn plan(
    source_side: usize,
    target_side: usize,
    max_elements: usize,
) -> Result<GeometricPlan, GeometricError> {
    check_size(&[source_side.saturating_add(target_side)], max_elements)?;
    let ratio = ratio(source_side, target_side)?;
    Ok(GeometricPlan {
        ratio,
        source: source_coordinates(source_side, ratio)?,
        target: target_coordinates(target_side)?,
    })
}

/// Resample `src`, a row-major `[side, side, channels]` relative table, to
/// `[target_side, target_side, channels]`. Refused when the result or the spline weights would
/// exceed `max_elements` (or [`HARD_ELEMENT_LIMIT`]).
pub fn resample(
    src: &[f64],
    side: usize,
    channels: usize,
    target_side: usize,
    max_elements: usize,
) -> Result<Vec<f64>, GeometricError> {
    let expected = (side as u128 * side as u128).saturating_mul(channels as u128);
    if expected != src.len() as u128 {
        return Err(GeometricError::LengthMismatch {
            found: src.len(),
            expected,
            side,
            channels,
        });
    }
    let out_len = check_size(&[target_side, target_side, channels], max_elements)?;
    let ratio = ratio(side, target_side)?;
    if channels == 0 || side == target_side {
        let mut copy = try_with_capacity(out_len)?;
        copy.extend_from_slice(src);
        return Ok(copy);
    }
    check_size(&[target_side, side], max_elements)?;
    let nodes = source_coordinates(side, ratio)?;
    let at = target_coordinates(target_side)?;
    let weight = spline_weights(&nodes, &at)?;
    let index = try_collect(target_side * side, (0..target_side).flat_map(|_| 0..side))?;
    let axis = AxisWeights {
        input: side,
        output: target_side,
        taps: side,
        index,
        weight,
    };
    Ok(apply(src, (side, side), channels, &axis, &axis)?)
}

impl From<super::ResampleError> for GeometricError {
    fn from(e: super::ResampleError) -> Self {
        match e {
            super::ResampleError::OutOfMemory { bytes } => OutOfMemory { bytes }.into(),
            // `apply` fails only by allocation; anything else would be a size it was not given.
            _ => GeometricError::TooLarge {
                needed: u128::MAX,
                limit: HARD_ELEMENT_LIMIT,
            },
        }
    }
}

/// The interpolating cubic spline with not-a-knot ends through `nodes`, as a matrix
/// `[at.len(), nodes.len()]` (row-major): row `a` holds the weights of every node value in the
/// spline's value at `at[a]`. Points outside the nodes read the nearest end value, as the
/// reference bivariate spline evaluator does (it clamps its arguments to the data range).
pub fn spline_weights(nodes: &[f64], at: &[f64]) -> Result<Vec<f64>, GeometricError> {
    let n = nodes.len();
    let increasing = nodes.windows(2).all(|p| p[0] < p[1]);
    if n < 4 || !increasing || !nodes.iter().all(|x| x.is_finite()) {
        return Err(GeometricError::BadNodes);
    }
    if !at.iter().all(|x| x.is_finite()) {
        return Err(GeometricError::BadPoints);
    }
    let len = check_size(&[at.len(), n], usize::MAX)?;
    let pieces = try_collect(at.len(), at.iter().map(|&x| Piece::locate(nodes, x)))?;
    let mut weights = crate::values::try_filled(len, 0.0)?;
    let mut unit = crate::values::try_filled(n, 0.0)?;
    for c in 0..n {
        unit.fill(0.0);
        unit[c] = 1.0;
        let slopes = not_a_knot_slopes(nodes, &unit)?;
        for (a, piece) in pieces.iter().enumerate() {
            weights[a * n + c] = piece.value(&unit, &slopes);
        }
    }
    Ok(weights)
}

/// Where a point falls: the interval `[x_i, x_{i+1}]` and the Hermite basis there.
struct Piece {
    i: usize,
    width: f64,
    basis: [f64; 4],
}

impl Piece {
    fn locate(nodes: &[f64], x: f64) -> Piece {
        let n = nodes.len();
        let x = x.clamp(nodes[0], nodes[n - 1]);
        let i = nodes.partition_point(|&node| node <= x).clamp(1, n - 1) - 1;
        let width = nodes[i + 1] - nodes[i];
        let t = (x - nodes[i]) / width;
        let (t2, t3) = (t * t, t * t * t);
        let basis = [
            2.0 * t3 - 3.0 * t2 + 1.0,
            t3 - 2.0 * t2 + t,
            -2.0 * t3 + 3.0 * t2,
            t3 - t2,
        ];
        Piece { i, width, basis }
    }

    fn value(&self, values: &[f64], slopes: &[f64]) -> f64 {
        let (i, b, h) = (self.i, self.basis, self.width);
        b[0] * values[i] + b[1] * h * slopes[i] + b[2] * values[i + 1] + b[3] * h * slopes[i + 1]
    }
}

/// The first derivatives at the nodes of the not-a-knot cubic spline through `(nodes, values)`
/// (`n ≥ 4`): second derivatives continuous at every inner node, third derivatives continuous
/// at the second and the second-to-last node.
fn not_a_knot_slopes(nodes: &[f64], values: &[f64]) -> Result<Vec<f64>, GeometricError> {
    let n = nodes.len();
    let dx: Vec<f64> = nodes.windows(2).map(|p| p[1] - p[0]).collect();
    let slope: Vec<f64> = values
        .windows(2)
        .zip(&dx)
        .map(|(v, h)| (v[1] - v[0]) / h)
        .collect();
    let (mut sub, mut diag, mut sup, mut rhs) = (
        vec![0.0; n - 1],
        vec![0.0; n],
        vec![0.0; n - 1],
        vec![0.0; n],
    );
    for i in 1..n - 1 {
        sub[i - 1] = dx[i];
        diag[i] = 2.0 * (dx[i - 1] + dx[i]);
        sup[i] = dx[i - 1];
        rhs[i] = 3.0 * (dx[i] * slope[i - 1] + dx[i - 1] * slope[i]);
    }
    let first = dx[0] + dx[1];
    diag[0] = dx[1];
    sup[0] = first;
    rhs[0] = ((dx[0] + 2.0 * first) * dx[1] * slope[0] + dx[0] * dx[0] * slope[1]) / first;
    let (a, b) = (dx[n - 3], dx[n - 2]);
    let last = a + b;
    sub[n - 2] = last;
    diag[n - 1] = a;
    rhs[n - 1] = (b * b * slope[n - 3] + (2.0 * last + b) * a * slope[n - 2]) / last;
    solve_tridiagonal(&mut sub, &mut diag, &mut sup, &mut rhs).ok_or(GeometricError::BadNodes)?;
    Ok(rhs)
}

/// Solve a tridiagonal system in place (`rhs` becomes the solution) by Gaussian elimination
/// with partial pivoting: the not-a-knot end rows are not diagonally dominant. `None` when
/// the matrix is singular.
fn solve_tridiagonal(
    sub: &mut [f64],
    diag: &mut [f64],
    sup: &mut [f64],
    rhs: &mut [f64],
) -> Option<()> {
    let n = diag.len();
    // Row i after elimination: diag[i]·x_i + sup[i]·x_{i+1} + fill[i]·x_{i+2}.
    let mut fill = vec![0.0; n];
    for i in 0..n - 1 {
        if diag[i].abs() >= sub[i].abs() {
            if diag[i] == 0.0 {
                return None;
            }
            let factor = sub[i] / diag[i];
            diag[i + 1] -= factor * sup[i];
            rhs[i + 1] -= factor * rhs[i];
        } else {
            // Swap rows i and i+1, then eliminate below.
            let factor = diag[i] / sub[i];
            diag[i] = sub[i];
            let next_diag = diag[i + 1];
            diag[i + 1] = sup[i] - factor * next_diag;
            if i + 2 < n {
                fill[i] = sup[i + 1];
                sup[i + 1] = -factor * fill[i];
            }
            sup[i] = next_diag;
            let upper = rhs[i];
            rhs[i] = rhs[i + 1];
            rhs[i + 1] = upper - factor * rhs[i];
        }
    }
    if diag[n - 1] == 0.0 {
        return None;
    }
    rhs[n - 1] /= diag[n - 1];
    rhs[n - 2] = (rhs[n - 2] - sup[n - 2] * rhs[n - 1]) / diag[n - 2];
    for i in (0..n.saturating_sub(2)).rev() {
        rhs[i] = (rhs[i] - sup[i] * rhs[i + 1] - fill[i] * rhs[i + 2]) / diag[i];
    }
    rhs.iter().all(|v| v.is_finite()).then_some(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_spline_reproduces_cubics_exactly() {
        // A not-a-knot spline through samples of a cubic is that cubic (any node spacing).
        let nodes = [-3.0, -1.2, 0.0, 0.7, 2.5, 4.0];
        let cubic = |x: f64| 0.5 * x * x * x - x * x + 2.0 * x - 1.0;
        let at = [-3.0, -2.0, -0.3, 0.0, 1.1, 3.9, 4.0];
        let w = spline_weights(&nodes, &at).unwrap();
        for (a, &x) in at.iter().enumerate() {
            let v: f64 = (0..nodes.len())
                .map(|c| w[a * 6 + c] * cubic(nodes[c]))
                .sum();
            assert!((v - cubic(x)).abs() < 1e-12, "at {x}: {v} vs {}", cubic(x));
        }
    }

    #[test]
    fn outside_points_read_the_end_values() {
        let nodes = [0.0, 1.0, 2.0, 3.0];
        let w = spline_weights(&nodes, &[-1.0, 5.0]).unwrap();
        assert_eq!(&w[..4], &[1.0, 0.0, 0.0, 0.0]);
        assert_eq!(&w[4..], &[0.0, 0.0, 0.0, 1.0]);
    }

    #[test]
    fn coordinates_follow_the_ratio() {
        let x = source_coordinates(7, 1.5).unwrap();
        assert_eq!(x, [-4.75, -2.5, -1.0, 0.0, 1.0, 2.5, 4.75]);
        assert_eq!(target_coordinates(5).unwrap(), [-2.0, -1.0, 0.0, 1.0, 2.0]);
    }

    #[test]
    fn the_ratio_places_the_outermost_offset() {
        for (s, t) in [(13, 23), (27, 47), (23, 13), (15, 17)] {
            let q = ratio(s, t).unwrap();
            let edge = *source_coordinates(s, q).unwrap().last().unwrap();
            assert!(
                (edge - (t / 2) as f64).abs() < 1e-3,
                "{s}->{t}: q {q}, edge {edge}"
            );
        }
        assert_eq!(ratio(13, 13), Ok(1.0));
    }

    #[test]
    fn equal_sides_copy_and_unreachable_sides_are_errors() {
        let table: Vec<f64> = (0..25).map(f64::from).collect();
        assert_eq!(resample(&table, 5, 1, 5, 1000).unwrap(), table);
        assert!(matches!(
            ratio(61, 63),
            Err(GeometricError::EdgeOutOfReach { .. })
        ));
        assert!(matches!(
            ratio(13, 101),
            Err(GeometricError::EdgeOutOfReach { .. })
        ));
        assert!(matches!(
            ratio(23, 3),
            Err(GeometricError::EdgeOutOfReach { .. })
        ));
        assert!(matches!(
            ratio(3, 5),
            Err(GeometricError::EdgeOutOfReach { .. })
        ));
        assert!(matches!(ratio(4, 7), Err(GeometricError::BadSide(4))));
    }

    #[test]
    fn bad_inputs_are_errors() {
        assert!(matches!(
            resample(&[0.0; 24], 5, 1, 7, 1000),
            Err(GeometricError::LengthMismatch { .. })
        ));
        assert!(matches!(
            resample(&[0.0; 25], 5, 1, 7, 48),
            Err(GeometricError::TooLarge { .. })
        ));
        assert!(resample(&[], usize::MAX, usize::MAX, 7, 1000).is_err());
        assert_eq!(resample(&[], 13, 0, 23, 1000), Ok(vec![]));
        assert!(resample(&[], 1 << 40 | 1, 0, 1, 1000).is_err());
        assert!(plan(usize::MAX, 3, usize::MAX).is_err());
        assert!(matches!(
            spline_weights(&[0.0, 1.0, 1.0, 2.0], &[0.5]),
            Err(GeometricError::BadNodes)
        ));
        assert!(matches!(
            spline_weights(&[0.0, 1.0, 2.0, 3.0], &[f64::NAN]),
            Err(GeometricError::BadPoints)
        ));
    }
}
