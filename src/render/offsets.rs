//! Drawing a relative table as images: per head, the bias as a function of the offset between
//! two positions (`[2Wh−1, 2Ww−1]`, zero offset in the middle), before and after side by side,
//! each head on its own symmetric colour scale so a head's shape is visible whatever its range.

use super::canvas::{Canvas, Rgb};
use super::colour;

const PAPER: Rgb = [250, 248, 243];
const INK: Rgb = [34, 38, 46];
const MARGIN: i64 = 28;
const TEXT: usize = 2;
/// Heads drawn at most (a figure stays readable; the rest are named in the subtitle).
pub const MAX_HEADS: usize = 12;

/// One table's offset grid `[h, w, heads]` (row-major, heads contiguous).
pub struct OffsetGrid<'a> {
    pub values: &'a [f32],
    pub h: usize,
    pub w: usize,
    pub heads: usize,
}

impl OffsetGrid<'_> {
    fn at(&self, r: usize, c: usize, head: usize) -> f32 {
        self.values[(r * self.w + c) * self.heads + head]
    }

    fn max_abs(&self, head: usize) -> f32 {
        (0..self.h * self.w)
            .map(|i| self.values[i * self.heads + head].abs())
            .filter(|v| v.is_finite())
            .fold(0.0, f32::max)
    }
}

/// Draw the heads of `before` and `after` (same head count) in two columns.
pub fn draw(title: &str, subtitle: &str, before: &OffsetGrid, after: &OffsetGrid) -> Canvas {
    let heads = before.heads.min(after.heads).min(MAX_HEADS);
    let tile = 150usize;
    let row_h = tile as i64 + 34;
    let top = MARGIN + 24 + 14 + 16 + 46;
    let width = (2 * MARGIN + 2 * tile as i64 + 60 + 120)
        .max(2 * MARGIN + Canvas::text_size(title, 3).0 as i64)
        .max(2 * MARGIN + Canvas::text_size(subtitle, TEXT).0 as i64);
    let height = top + heads as i64 * row_h + MARGIN;
    let mut c = Canvas::new(width as usize, height as usize, PAPER);
    c.text(MARGIN, MARGIN, title, 3, INK);
    c.text(MARGIN, MARGIN + 24 + 14, subtitle, TEXT, INK);
    let columns = [
        (MARGIN, before, format!("before: {}x{}", before.h, before.w)),
        (
            MARGIN + tile as i64 + 60,
            after,
            format!("after: {}x{}", after.h, after.w),
        ),
    ];
    for (x, _, label) in &columns {
        c.text(*x, top - 26, label, TEXT, INK);
    }
    for head in 0..heads {
        let y = top + head as i64 * row_h;
        // One scale per head, shared by before and after.
        let scale = before
            .max_abs(head)
            .max(after.max_abs(head))
            .max(f32::MIN_POSITIVE);
        for (x, grid, _) in &columns {
            draw_image(&mut c, grid, head, *x, y, tile, scale);
        }
        let label = format!("head {head}: scale +/-{scale:.3}");
        c.text(
            MARGIN + 2 * tile as i64 + 80,
            y + tile as i64 / 2 - 8,
            &label,
            TEXT,
            INK,
        );
    }
    c
}

fn draw_image(
    c: &mut Canvas,
    g: &OffsetGrid,
    head: usize,
    x: i64,
    y: i64,
    tile: usize,
    scale: f32,
) {
    for py in 0..tile {
        let r = py * g.h / tile;
        for px in 0..tile {
            let col = px * g.w / tile;
            let v = g.at(r, col, head) / scale;
            c.put(x + px as i64, y + py as i64, colour::diverging(v as f64));
        }
    }
    c.frame(x - 1, y - 1, tile + 2, tile + 2, 1, INK);
}
