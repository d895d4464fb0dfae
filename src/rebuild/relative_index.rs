//! The index buffer of a window-relative table (common practice in window-attention models).
//!
//! A `Wh×Ww` window has `N = Wh·Ww` positions, row-major. Two positions `a = (ya, xa)` and
//! `b = (yb, xb)` read table row `(ya − yb + Wh − 1)·(2Ww − 1) + (xa − xb + Ww − 1)`: the
//! offset between them, shifted to be non-negative, row offset outer. The buffer is `[N, N]`,
//! entry `[a][b]`. Tables with class rows (BEiT-style) hold `M = (2Wh−1)(2Ww−1) + 3` rows and
//! the buffer grows to `[N+1, N+1]` with the class token first: row 0 reads `M−3` (class as
//! query), column 0 reads `M−2` (token as query, class as key) and `[0][0]` reads `M−1`.

use super::{check_size, factor_pairs, RebuildError};
use crate::values::try_with_capacity;

/// A window and whether the buffer carries the class token's row and column.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct IndexLayout {
    /// `(Wh, Ww)`.
    pub window: (usize, usize),
    pub class_rows: bool,
}

impl IndexLayout {
    /// Rows of the table this buffer indexes: `(2Wh−1)(2Ww−1)`, plus 3 with class rows.
    pub fn table_rows(&self) -> Option<usize> {
        let (wh, ww) = self.window;
        let span = |side: usize| side.checked_mul(2)?.checked_sub(1);
        let grid = span(wh)?.checked_mul(span(ww)?)?;
        grid.checked_add(if self.class_rows { 3 } else { 0 })
    }

    /// Side of the square buffer: `Wh·Ww`, plus 1 with class rows.
    pub fn side(&self) -> Option<usize> {
        let n = self.window.0.checked_mul(self.window.1)?;
        n.checked_add(usize::from(self.class_rows))
    }

    /// The table row entry `[row][col]` of the buffer reads.
    fn entry(&self, row: usize, col: usize, table_rows: usize) -> i64 {
        if self.class_rows {
            match (row, col) {
                (0, 0) => return table_rows as i64 - 1,
                (0, _) => return table_rows as i64 - 3,
                (_, 0) => return table_rows as i64 - 2,
                _ => return self.token_entry(row - 1, col - 1),
            }
        }
        self.token_entry(row, col)
    }

    fn token_entry(&self, a: usize, b: usize) -> i64 {
        let (wh, ww) = (self.window.0 as i64, self.window.1 as i64);
        let (ya, xa) = (a as i64 / ww, a as i64 % ww);
        let (yb, xb) = (b as i64 / ww, b as i64 % ww);
        (ya - yb + wh - 1) * (2 * ww - 1) + (xa - xb + ww - 1)
    }
}

/// Build the `[side, side]` index buffer of `layout`, row-major. Refused when it would hold
/// more than `max_elements` (or [`super::HARD_ELEMENT_LIMIT`]) entries.
pub fn build(layout: IndexLayout, max_elements: usize) -> Result<Vec<i64>, RebuildError> {
    let (wh, ww) = layout.window;
    if wh == 0 || ww == 0 {
        return Err(RebuildError::EmptyWindow(wh, ww));
    }
    let n = check_size(&[wh, ww], usize::MAX)?;
    let side = n + usize::from(layout.class_rows);
    let len = check_size(&[side, side], max_elements)?;
    let rows = layout.table_rows().ok_or(RebuildError::TooLarge {
        needed: u128::MAX,
        limit: max_elements,
    })?;
    let mut out = try_with_capacity(len)?;
    for row in 0..side {
        out.extend((0..side).map(|col| layout.entry(row, col, rows)));
    }
    Ok(out)
}

/// Whether `buffer` (`[side, side]`, row-major) is exactly the index of `layout`.
pub fn fits(buffer: &[i64], side: usize, layout: IndexLayout) -> bool {
    let (Some(expected_side), Some(rows)) = (layout.side(), layout.table_rows()) else {
        return false;
    };
    if layout.window.0 == 0 || layout.window.1 == 0 || side != expected_side {
        return false;
    }
    if side.checked_mul(side) != Some(buffer.len()) {
        return false;
    }
    buffer.chunks_exact(side).enumerate().all(|(row, values)| {
        values
            .iter()
            .enumerate()
            .all(|(col, &v)| v == layout.entry(row, col, rows))
    })
}

/// Every layout whose index is exactly `buffer` (`[side, side]`). Usually one; a `1×N` and an
/// `N×1` window give the same buffer, so both are listed (square windows first, then the rest
/// by ascending `Wh`). Empty when the buffer is no such index.
pub fn layouts_of(buffer: &[i64], side: usize) -> Vec<IndexLayout> {
    if side == 0 || side.checked_mul(side) != Some(buffer.len()) {
        return Vec::new();
    }
    let mut found = Vec::new();
    for class_rows in [false, true] {
        let n = side - usize::from(class_rows);
        for window in factor_pairs(n) {
            let layout = IndexLayout { window, class_rows };
            if fits(buffer, side, layout) {
                found.push(layout);
            }
        }
    }
    found.sort_by_key(|l| (l.window.0 != l.window.1, l.class_rows, l.window.0));
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    const PLAIN_2X2: IndexLayout = IndexLayout {
        window: (2, 2),
        class_rows: false,
    };

    #[test]
    fn a_two_by_two_window_reads_offsets_row_major() {
        // Written out by hand: 9 offsets, centre row 4 on the diagonal.
        let expected = [
            4, 3, 1, 0, //
            5, 4, 2, 1, //
            7, 6, 4, 3, //
            8, 7, 5, 4,
        ];
        assert_eq!(build(PLAIN_2X2, 100).unwrap(), expected);
        assert_eq!(layouts_of(&expected, 4), [PLAIN_2X2]);
    }

    #[test]
    fn class_rows_take_the_last_three_table_rows() {
        let layout = IndexLayout {
            window: (2, 2),
            class_rows: true,
        };
        let b = build(layout, 100).unwrap();
        assert_eq!(&b[..5], &[11, 9, 9, 9, 9]);
        assert_eq!(b[5], 10);
        assert_eq!(&b[6..10], &[4, 3, 1, 0]);
        assert_eq!(layouts_of(&b, 5), [layout]);
    }

    #[test]
    fn bad_requests_are_errors() {
        let empty = IndexLayout {
            window: (0, 3),
            class_rows: false,
        };
        assert!(matches!(
            build(empty, 100),
            Err(RebuildError::EmptyWindow(0, 3))
        ));
        assert!(matches!(
            build(PLAIN_2X2, 15),
            Err(RebuildError::TooLarge { .. })
        ));
        let huge = IndexLayout {
            window: (usize::MAX, 2),
            class_rows: true,
        };
        assert!(build(huge, usize::MAX).is_err());
        assert!(!fits(&[], 0, huge));
        assert!(layouts_of(&[1, 2, 3], 2).is_empty());
        assert!(layouts_of(&[], 0).is_empty());
    }
}
