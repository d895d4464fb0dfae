//! The attention mask of shifted-window attention (common practice in window-attention
//! hierarchies).
//!
//! After a feature map `H×W` is rolled by the shift `(sh, sw)`, one window can hold cells that
//! were far apart, and attention between them is masked. Along each axis the cells fall in
//! three bands, `[0, H−Wh)`, `[H−Wh, H−sh)` and `[H−sh, H)`; a cell's region is
//! `row band · 3 + column band`. Windows are taken row-major over `(H/Wh, W/Ww)`, cells inside
//! a window row-major, and `mask[w][i][j]` is 0 when cells `i` and `j` of window `w` share a
//! region, −100 otherwise. Where a window covers the whole map along an axis, no shift is
//! applied along it (common practice: rolling a single window onto itself separates nothing),
//! and without any shift there is no mask at all.

use super::{check_size, factor_pairs, RebuildError};
use crate::values::try_with_capacity;

/// Attention between cells of different regions gets this bias (common practice).
pub const MASKED: f32 = -100.0;

/// A feature map, its window and its shift, all `(rows, columns)`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MaskLayout {
    pub map: (usize, usize),
    pub window: (usize, usize),
    pub shift: (usize, usize),
}

impl MaskLayout {
    /// Windows in the map (`None` for an empty window or a count past `usize`).
    pub fn windows(&self) -> Option<usize> {
        let rows = self.map.0.checked_div(self.window.0)?;
        rows.checked_mul(self.map.1.checked_div(self.window.1)?)
    }

    /// Cells in a window (`None` past `usize`).
    pub fn cells(&self) -> Option<usize> {
        self.window.0.checked_mul(self.window.1)
    }

    /// `(windows, cells, mask elements)`, each counted without overflow and bounded.
    fn counts(&self, max_elements: usize) -> Result<(usize, usize, usize), RebuildError> {
        let per_window = [self.window.0, self.window.1];
        let windows = [self.map.0 / self.window.0, self.map.1 / self.window.1];
        let len = check_size(&[windows, per_window, per_window].concat(), max_elements)?;
        Ok((windows[0] * windows[1], per_window[0] * per_window[1], len))
    }

    /// The shift actually applied: none along an axis the window covers.
    pub fn effective_shift(&self) -> (usize, usize) {
        let along = |map: usize, win: usize, shift: usize| if map == win { 0 } else { shift };
        (
            along(self.map.0, self.window.0, self.shift.0),
            along(self.map.1, self.window.1, self.shift.1),
        )
    }

    fn check(&self) -> Result<(), RebuildError> {
        let ((h, w), (wh, ww), (sh, sw)) = (self.map, self.window, self.shift);
        if wh == 0 || ww == 0 {
            return Err(RebuildError::EmptyWindow(wh, ww));
        }
        if h == 0 || w == 0 {
            return Err(RebuildError::EmptyMap(h, w));
        }
        if h % wh != 0 || w % ww != 0 {
            return Err(RebuildError::MapNotDivisible {
                map_h: h,
                map_w: w,
                win_h: wh,
                win_w: ww,
            });
        }
        if sh >= wh || sw >= ww {
            return Err(RebuildError::ShiftTooLarge {
                shift_h: sh,
                shift_w: sw,
                win_h: wh,
                win_w: ww,
            });
        }
        Ok(())
    }

    /// The region of the cell at `(y, x)` of the whole map.
    fn region(&self, y: usize, x: usize) -> usize {
        let (sh, sw) = self.effective_shift();
        band(y, self.map.0, self.window.0, sh) * 3 + band(x, self.map.1, self.window.1, sw)
    }

    /// Map coordinates of cell `cell` of window `window`.
    fn cell_at(&self, window: usize, cell: usize) -> (usize, usize) {
        let per_row = self.map.1 / self.window.1;
        let (wy, wx) = (window / per_row, window % per_row);
        let (cy, cx) = (cell / self.window.1, cell % self.window.1);
        (wy * self.window.0 + cy, wx * self.window.1 + cx)
    }

    /// Regions of the cells of one window, in cell order.
    fn window_regions(&self, window: usize) -> impl Iterator<Item = usize> + '_ {
        (0..self.window.0 * self.window.1).map(move |cell| {
            let (y, x) = self.cell_at(window, cell);
            self.region(y, x)
        })
    }
}

fn band(pos: usize, side: usize, win: usize, shift: usize) -> usize {
    if pos < side - win {
        0
    } else if pos < side - shift {
        1
    } else {
        2
    }
}

/// Build the `[nW, N, N]` mask of `layout`, or `None` when no shift is applied. Refused when
/// the map does not split into windows, a shift is not smaller than its window, or the mask
/// would hold more than `max_elements` (or [`super::HARD_ELEMENT_LIMIT`]) values.
pub fn build(layout: MaskLayout, max_elements: usize) -> Result<Option<Vec<f32>>, RebuildError> {
    layout.check()?;
    if layout.effective_shift() == (0, 0) {
        return Ok(None);
    }
    let (nw, n, len) = layout.counts(max_elements)?;
    let mut out = try_with_capacity(len)?;
    let mut regions = try_with_capacity(n)?;
    for window in 0..nw {
        regions.clear();
        regions.extend(layout.window_regions(window));
        for &ri in &regions {
            out.extend(
                regions
                    .iter()
                    .map(|&rj| if ri == rj { 0.0 } else { MASKED }),
            );
        }
    }
    Ok(Some(out))
}

/// Whether `values` (`[nW, N, N]`, row-major) is exactly the mask of `layout`.
pub fn fits(values: &[f32], layout: MaskLayout) -> bool {
    if layout.check().is_err() || layout.effective_shift() == (0, 0) {
        return false;
    }
    let Ok((_, n, len)) = layout.counts(usize::MAX) else {
        return false;
    };
    if len != values.len() {
        return false;
    }
    let mut regions = Vec::with_capacity(n);
    values
        .chunks_exact(n * n)
        .enumerate()
        .all(|(window, block)| {
            regions.clear();
            regions.extend(layout.window_regions(window));
            block.chunks_exact(n).zip(&regions).all(|(row, &ri)| {
                row.iter()
                    .zip(&regions)
                    .all(|(&v, &rj)| v == if ri == rj { 0.0 } else { MASKED })
            })
        })
}

/// Every layout whose mask is exactly `values`, given the buffer's shape `[windows, cells,
/// cells]`: square windows first, then square maps, then by ascending window rows. Empty when
/// the buffer is no such mask.
///
/// The shift is read from the last window, where every band meets: its first cell shares a
/// region with the cells of the first `Wh − sh` rows and `Ww − sw` columns only.
pub fn layouts_of(values: &[f32], windows: usize, cells: usize) -> Vec<MaskLayout> {
    let expected = check_size(&[windows, cells, cells], usize::MAX).ok();
    if windows == 0 || cells == 0 || expected != Some(values.len()) {
        return Vec::new();
    }
    let last_first_row = &values[(windows - 1) * cells * cells..][..cells];
    let mut found = Vec::new();
    for (wh, ww) in factor_pairs(cells) {
        let kept_rows = (0..wh)
            .take_while(|r| last_first_row[r * ww] == 0.0)
            .count();
        let kept_cols = (0..ww).take_while(|&c| last_first_row[c] == 0.0).count();
        let shift = (wh - kept_rows, ww - kept_cols);
        for (nh, nwc) in factor_pairs(windows) {
            let layout = MaskLayout {
                map: (nh * wh, nwc * ww),
                window: (wh, ww),
                shift,
            };
            if fits(values, layout) {
                found.push(layout);
            }
        }
    }
    found.sort_by_key(|l| (l.window.0 != l.window.1, l.map.0 != l.map.1, l.window.0));
    found
}

#[cfg(test)]
mod tests {
    use super::*;

    fn layout(map: usize, win: usize, shift: usize) -> MaskLayout {
        MaskLayout {
            map: (map, map),
            window: (win, win),
            shift: (shift, shift),
        }
    }

    #[test]
    fn a_four_by_four_map_with_two_by_two_windows() {
        // By hand: shift 1 gives bands {0,1}, {2}, {3} per axis. Window 0 lies in one region;
        // window 3 (bottom right) holds four regions, one cell each.
        let mask = build(layout(4, 2, 1), 1000).unwrap().unwrap();
        assert_eq!(mask.len(), 4 * 4 * 4);
        assert!(mask[..16].iter().all(|&v| v == 0.0));
        let last = &mask[48..];
        for i in 0..4 {
            for j in 0..4 {
                assert_eq!(last[i * 4 + j], if i == j { 0.0 } else { MASKED });
            }
        }
        assert_eq!(layouts_of(&mask, 4, 4), [layout(4, 2, 1)]);
    }

    #[test]
    fn no_shift_means_no_mask() {
        assert_eq!(build(layout(14, 7, 0), 1 << 20), Ok(None));
        assert_eq!(build(layout(7, 7, 3), 1 << 20), Ok(None));
    }

    #[test]
    fn bad_requests_are_errors() {
        assert!(matches!(
            build(layout(14, 0, 0), 10),
            Err(RebuildError::EmptyWindow(..))
        ));
        assert!(matches!(
            build(layout(0, 7, 3), 10),
            Err(RebuildError::EmptyMap(..))
        ));
        assert!(matches!(
            build(layout(15, 7, 3), 10),
            Err(RebuildError::MapNotDivisible { .. })
        ));
        assert!(matches!(
            build(layout(14, 7, 7), 10),
            Err(RebuildError::ShiftTooLarge { .. })
        ));
        assert!(matches!(
            build(layout(14, 7, 3), 10),
            Err(RebuildError::TooLarge { .. })
        ));
        let huge = MaskLayout {
            map: (1 << 40, 1 << 40),
            window: (1, 2),
            shift: (0, 1),
        };
        assert!(matches!(
            build(huge, usize::MAX),
            Err(RebuildError::TooLarge { .. })
        ));
        assert!(!fits(&[0.0; 3], huge));
        assert!(layouts_of(&[0.0; 3], 1, 2).is_empty());
        assert!(layouts_of(&[], 0, 0).is_empty());
        assert!(layouts_of(&[0.0; 8], usize::MAX, 2).is_empty());
    }
}
