//! Drawing similarity figures: tiles of cosine-similarity maps (one per reference position),
//! before and after side by side, a labelled colour bar, and a similarity-against-distance
//! chart. The maths lives in [`crate::similarity`]; this module only places pixels.

pub mod canvas;
pub mod colour;
pub mod font;
pub mod offsets;

use canvas::{Canvas, Rgb};

use crate::similarity::MapSet;

const PAPER: Rgb = [250, 248, 243];
const INK: Rgb = [34, 38, 46];
const FAINT: Rgb = [214, 210, 202];
const SERIES: [Rgb; 2] = [[38, 70, 96], [214, 98, 44]];
const MARGIN: i64 = 28;
const GAP: usize = 3;
const PANEL_GAP: i64 = 44;
const TEXT: usize = 2;

/// One set of maps with its heading.
pub struct Panel<'a> {
    pub label: String,
    pub set: &'a MapSet,
}

/// A whole figure: a title, a line of detail, and one or two panels.
pub struct Figure<'a> {
    pub title: String,
    pub subtitle: String,
    pub panels: Vec<Panel<'a>>,
}

/// Tile size in pixels so a panel stays near 640 px (and the image under 4096 px a side).
fn tile_size(set: &MapSet) -> usize {
    let n = set.ref_rows.len().max(set.ref_cols.len()).max(1);
    (640 / n).clamp(16, 120)
}

fn panel_size(set: &MapSet, tile: usize) -> (usize, usize) {
    let (r, c) = (set.ref_rows.len(), set.ref_cols.len());
    (c * tile + (c - 1) * GAP, r * tile + (r - 1) * GAP)
}

/// Draw the figure.
pub fn draw(fig: &Figure) -> Canvas {
    let tile = fig
        .panels
        .iter()
        .map(|p| tile_size(p.set))
        .min()
        .unwrap_or(40);
    let sizes: Vec<(usize, usize)> = fig.panels.iter().map(|p| panel_size(p.set, tile)).collect();
    let panels_w: i64 =
        sizes.iter().map(|s| s.0 as i64).sum::<i64>() + PANEL_GAP * (sizes.len() as i64 - 1);
    let panel_h = sizes.iter().map(|s| s.1).max().unwrap_or(0) as i64;
    let bar_w = 22i64;
    let text_w = Canvas::text_size(&fig.title, 3)
        .0
        .max(Canvas::text_size(&fig.subtitle, TEXT).0) as i64;
    let width = (MARGIN + panels_w + 30 + bar_w + 70 + MARGIN)
        .max(2 * MARGIN + text_w)
        .max(720);
    let title_h = 3 * 8;
    let panels_top = MARGIN + title_h + 14 + 16 + 30 + 22;
    let chart_top = panels_top + panel_h + 46;
    let chart_h = 250i64;
    let height = chart_top + chart_h + MARGIN;
    let mut c = Canvas::new(width as usize, height as usize, PAPER);

    c.text(MARGIN, MARGIN, &fig.title, 3, INK);
    c.text(MARGIN, MARGIN + title_h + 14, &fig.subtitle, TEXT, INK);

    let mut x = MARGIN;
    for (panel, size) in fig.panels.iter().zip(&sizes) {
        c.text(x, panels_top - 26, &panel.label, TEXT, INK);
        draw_tiles(&mut c, panel.set, x, panels_top, tile);
        x += size.0 as i64 + PANEL_GAP;
    }
    draw_colour_bar(
        &mut c,
        x - PANEL_GAP + 30,
        panels_top,
        bar_w as usize,
        panel_h as usize,
    );
    draw_chart(
        &mut c,
        fig,
        MARGIN,
        chart_top,
        (width - 2 * MARGIN) as usize,
        chart_h as usize,
    );
    c
}

fn draw_tiles(c: &mut Canvas, set: &MapSet, x0: i64, y0: i64, tile: usize) {
    let cols = set.ref_cols.len();
    for (k, map) in set.maps.iter().enumerate() {
        let (ti, tj) = (k / cols, k % cols);
        let tx = x0 + (tj * (tile + GAP)) as i64;
        let ty = y0 + (ti * (tile + GAP)) as i64;
        for py in 0..tile {
            let r = py * set.h / tile;
            for px in 0..tile {
                let col = px * set.w / tile;
                c.put(
                    tx + px as i64,
                    ty + py as i64,
                    colour::diverging(map[r * set.w + col] as f64),
                );
            }
        }
        // Mark the reference cell: its footprint in the tile, at least 7 px across.
        let (rr, rc) = (set.ref_rows[ti], set.ref_cols[tj]);
        let (cx0, cx1) = (rc * tile / set.w, (rc + 1) * tile / set.w);
        let (cy0, cy1) = (rr * tile / set.h, (rr + 1) * tile / set.h);
        let (mw, mh) = ((cx1 - cx0).max(7), (cy1 - cy0).max(7));
        let mx = tx + ((cx0 + cx1) / 2) as i64 - mw as i64 / 2;
        let my = ty + ((cy0 + cy1) / 2) as i64 - mh as i64 / 2;
        c.frame(mx - 1, my - 1, mw + 2, mh + 2, 1, PAPER);
        c.frame(mx, my, mw, mh, 1, INK);
    }
}

fn draw_colour_bar(c: &mut Canvas, x: i64, y: i64, w: usize, h: usize) {
    for py in 0..h {
        let v = 1.0 - 2.0 * py as f64 / (h - 1).max(1) as f64;
        c.rect(x, y + py as i64, w, 1, colour::diverging(v));
    }
    c.frame(x - 1, y - 1, w + 2, h + 2, 1, INK);
    for (v, label) in [
        (1.0, "+1"),
        (0.5, "0.5"),
        (0.0, "0"),
        (-0.5, "-0.5"),
        (-1.0, "-1"),
    ] {
        let ty = y + ((1.0 - v) / 2.0 * (h - 1) as f64) as i64;
        c.rect(x + w as i64, ty, 5, 1, INK);
        c.text(x + w as i64 + 9, ty - 8, label, TEXT, INK);
    }
    c.text(x - 8, y + h as i64 + 10, "cosine", TEXT, INK);
}

fn draw_chart(c: &mut Canvas, fig: &Figure, x: i64, y: i64, w: usize, h: usize) {
    let (left, bottom, top) = (80i64, 44i64, 30i64);
    let (px, py) = (x + left, y + top);
    let (pw, ph) = (w as i64 - left - 10, h as i64 - top - bottom);
    c.text(
        x,
        y,
        "mean similarity against distance (fraction of the image side)",
        TEXT,
        INK,
    );
    let profiles: Vec<_> = fig.panels.iter().map(|p| &p.set.profile).collect();
    let xmax = profiles
        .iter()
        .flat_map(|p| {
            p.distance
                .iter()
                .zip(&p.mean)
                .filter(|(_, m)| m.is_some())
                .map(|(d, _)| *d)
        })
        .fold(0.1f64, f64::max);
    let xmax = (xmax * 10.0).ceil() / 10.0;
    let ymin = profiles
        .iter()
        .flat_map(|p| p.mean.iter().flatten())
        .fold(0.0f64, |a, b| a.min(*b));
    let ymin = ((ymin * 4.0).floor() / 4.0).max(-1.0);
    let to_x = |d: f64| px as f64 + d / xmax * pw as f64;
    let to_y = |v: f64| py as f64 + (1.0 - (v - ymin) / (1.0 - ymin)) * ph as f64;
    // Grid and ticks.
    let mut v = ymin;
    while v <= 1.0 + 1e-9 {
        let ty = to_y(v) as i64;
        c.rect(
            px,
            ty,
            pw as usize,
            1,
            if v.abs() < 1e-9 { INK } else { FAINT },
        );
        let label = format!("{v:.2}");
        let (lw, _) = Canvas::text_size(&label, TEXT);
        c.text(px - 10 - lw as i64, ty - 8, &label, TEXT, INK);
        v += 0.25;
    }
    let mut d = 0.0;
    while d <= xmax + 1e-9 {
        let tx = to_x(d) as i64;
        c.rect(tx, py + ph, 1, 6, INK);
        let label = format!("{d:.1}");
        let (lw, _) = Canvas::text_size(&label, TEXT);
        c.text(tx - lw as i64 / 2, py + ph + 12, &label, TEXT, INK);
        d += 0.1;
    }
    c.frame(px, py, pw as usize, ph as usize + 1, 1, INK);
    // Series, then the legend.
    for (i, (panel, profile)) in fig.panels.iter().zip(&profiles).enumerate() {
        let colour = SERIES[i % SERIES.len()];
        let points: Vec<(f64, f64)> = profile
            .distance
            .iter()
            .zip(&profile.mean)
            .filter_map(|(d, m)| m.map(|m| (to_x(*d), to_y(m))))
            .collect();
        for pair in points.windows(2) {
            c.line(pair[0], pair[1], 3, if i == 1 { 6 } else { 0 }, colour);
        }
        for p in &points {
            c.rect(p.0 as i64 - 3, p.1 as i64 - 3, 7, 7, colour);
        }
        let ly = py + 14 + i as i64 * 24;
        let lx = px + pw - 300;
        c.line(
            (lx as f64, ly as f64 + 8.0),
            (lx as f64 + 40.0, ly as f64 + 8.0),
            3,
            if i == 1 { 6 } else { 0 },
            colour,
        );
        c.text(lx + 52, ly, &panel.label, TEXT, INK);
    }
}
