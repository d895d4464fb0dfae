//! A plain RGB canvas with the few primitives the figures need: rectangles, lines, text.

use super::font::{self, ADVANCE, GLYPH_H, GLYPH_W};

pub type Rgb = [u8; 3];

pub struct Canvas {
    pub width: usize,
    pub height: usize,
    pub pixels: Vec<u8>,
}

impl Canvas {
    pub fn new(width: usize, height: usize, background: Rgb) -> Self {
        let mut pixels = Vec::with_capacity(width * height * 3);
        for _ in 0..width * height {
            pixels.extend_from_slice(&background);
        }
        Canvas {
            width,
            height,
            pixels,
        }
    }

    #[inline]
    pub fn put(&mut self, x: i64, y: i64, c: Rgb) {
        if x >= 0 && y >= 0 && (x as usize) < self.width && (y as usize) < self.height {
            let i = (y as usize * self.width + x as usize) * 3;
            self.pixels[i..i + 3].copy_from_slice(&c);
        }
    }

    pub fn get(&self, x: usize, y: usize) -> Rgb {
        let i = (y * self.width + x) * 3;
        [self.pixels[i], self.pixels[i + 1], self.pixels[i + 2]]
    }

    pub fn rect(&mut self, x: i64, y: i64, w: usize, h: usize, c: Rgb) {
        for yy in y..y + h as i64 {
            for xx in x..x + w as i64 {
                self.put(xx, yy, c);
            }
        }
    }

    /// A rectangle outline `t` pixels thick.
    pub fn frame(&mut self, x: i64, y: i64, w: usize, h: usize, t: usize, c: Rgb) {
        self.rect(x, y, w, t, c);
        self.rect(x, y + h as i64 - t as i64, w, t, c);
        self.rect(x, y, t, h, c);
        self.rect(x + w as i64 - t as i64, y, t, h, c);
    }

    /// A line `t` pixels thick; `dash` > 0 leaves gaps of that many steps.
    pub fn line(
        &mut self,
        (x0, y0): (f64, f64),
        (x1, y1): (f64, f64),
        t: usize,
        dash: usize,
        c: Rgb,
    ) {
        let steps = ((x1 - x0).abs().max((y1 - y0).abs()).ceil() as usize).max(1);
        for s in 0..=steps {
            if dash > 0 && (s / dash) % 2 == 1 {
                continue;
            }
            let f = s as f64 / steps as f64;
            let (x, y) = (x0 + (x1 - x0) * f, y0 + (y1 - y0) * f);
            let half = t as f64 / 2.0;
            self.rect(
                (x - half).round() as i64,
                (y - half).round() as i64,
                t,
                t,
                c,
            );
        }
    }

    /// Text with its top-left corner at (x, y), each font pixel `scale` canvas pixels.
    pub fn text(&mut self, x: i64, y: i64, text: &str, scale: usize, c: Rgb) {
        for (i, ch) in text.chars().enumerate() {
            let rows = font::glyph(ch);
            let gx = x + (i * ADVANCE * scale) as i64;
            for (ry, bits) in rows.iter().enumerate() {
                for rx in 0..GLYPH_W {
                    if bits & (1 << (GLYPH_W - 1 - rx)) != 0 {
                        self.rect(
                            gx + (rx * scale) as i64,
                            y + (ry * scale) as i64,
                            scale,
                            scale,
                            c,
                        );
                    }
                }
            }
        }
    }

    /// Width and height of text at a scale.
    pub fn text_size(text: &str, scale: usize) -> (usize, usize) {
        (font::text_width(text) * scale, GLYPH_H * scale)
    }

    /// Encode as PNG.
    pub fn png(&self) -> Vec<u8> {
        let mut out = Vec::new();
        let encoder = image::codecs::png::PngEncoder::new(&mut out);
        image::ImageEncoder::write_image(
            encoder,
            &self.pixels,
            self.width as u32,
            self.height as u32,
            image::ExtendedColorType::Rgb8,
        )
        .expect("encoding to memory cannot fail");
        out
    }
}
