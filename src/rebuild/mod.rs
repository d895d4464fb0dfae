//! Buffers that are rebuilt for a new grid or window rather than resampled: the index of a
//! window-relative table, the shifted-window attention mask and the 2-D rotary frequencies.
//! Each module builds its buffer from the published construction and checks whether a given
//! buffer is that construction (and for which window, map or parameters). Pure functions: no
//! file knowledge, every fault an error value, every output bounded before it is allocated.

pub mod patch_kernel;
pub mod relative_index;
pub mod rotary;
pub mod shift_mask;

use crate::values::OutOfMemory;

/// No output is ever larger than this many elements, whatever limit the caller gives.
pub const HARD_ELEMENT_LIMIT: usize = 1 << 31;

/// Why a buffer could not be built.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum RebuildError {
    #[error("window sides must be at least 1 (got {0}x{1})")]
    EmptyWindow(usize, usize),
    #[error("feature map sides must be at least 1 (got {0}x{1})")]
    EmptyMap(usize, usize),
    #[error("a {map_h}x{map_w} feature map does not split into {win_h}x{win_w} windows")]
    MapNotDivisible {
        map_h: usize,
        map_w: usize,
        win_h: usize,
        win_w: usize,
    },
    #[error("shift {shift_h}x{shift_w} must be smaller than the window {win_h}x{win_w}")]
    ShiftTooLarge {
        shift_h: usize,
        shift_w: usize,
        win_h: usize,
        win_w: usize,
    },
    #[error("grid side must be at least 1")]
    EmptyGrid,
    #[error("per-axis rotary width must be even and at least 2 (got {0})")]
    BadAxisDim(usize),
    #[error("rotary {name} must be finite and positive (got {value})")]
    BadRotaryParam { name: &'static str, value: f64 },
    #[error("the output would hold {needed} elements, over the limit of {limit}")]
    TooLarge { needed: u128, limit: usize },
    #[error(transparent)]
    OutOfMemory(#[from] OutOfMemory),
}

/// Check an element count against the caller's limit (and [`HARD_ELEMENT_LIMIT`]) before
/// anything is allocated. Counts are multiplied in u128 so no product can wrap.
pub(crate) fn check_size(factors: &[usize], limit: usize) -> Result<usize, RebuildError> {
    let needed = factors
        .iter()
        .try_fold(1u128, |acc, &f| acc.checked_mul(f as u128))
        .unwrap_or(u128::MAX);
    let limit = limit.min(HARD_ELEMENT_LIMIT);
    if needed > limit as u128 {
        return Err(RebuildError::TooLarge { needed, limit });
    }
    Ok(needed as usize)
}

/// Every `(a, b)` with `a · b == n`, `a` ascending.
pub(crate) fn factor_pairs(n: usize) -> Vec<(usize, usize)> {
    let mut pairs = Vec::new();
    let mut a = 1usize;
    while a.saturating_mul(a) <= n {
        if n % a == 0 {
            pairs.push((a, n / a));
        }
        a += 1;
    }
    let mirrored: Vec<_> = pairs
        .iter()
        .rev()
        .filter(|(a, b)| a != b)
        .map(|&(a, b)| (b, a))
        .collect();
    pairs.extend(mirrored);
    pairs
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn factor_pairs_cover_every_divisor_once() {
        assert_eq!(
            factor_pairs(12),
            [(1, 12), (2, 6), (3, 4), (4, 3), (6, 2), (12, 1)]
        );
        assert_eq!(factor_pairs(49), [(1, 49), (7, 7), (49, 1)]);
        assert_eq!(factor_pairs(1), [(1, 1)]);
        assert!(factor_pairs(0).is_empty());
    }

    #[test]
    fn sizes_over_the_limit_are_refused_without_wrapping() {
        assert_eq!(check_size(&[3, 4], 12), Ok(12));
        assert!(check_size(&[3, 5], 12).is_err());
        assert!(check_size(&[usize::MAX, usize::MAX, 2], usize::MAX).is_err());
        assert!(check_size(&[1 << 16, 1 << 16], usize::MAX).is_err());
    }
}
