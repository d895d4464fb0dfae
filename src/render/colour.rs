//! posgrid's diverging colour scale for signed similarity: built in the OKLab space (Björn
//! Ottosson's published transform), lightness falling linearly with |v| from a warm paper white
//! at 0 to deep ends at ±1 — slate blue for -1, ember red for +1 — so equal steps in value look
//! like equal steps in colour.

use super::canvas::Rgb;

const L_ZERO: f64 = 0.965;
const L_END: f64 = 0.40;
const CHROMA: f64 = 0.145;
/// Hue angles in degrees: negative end, positive end.
const HUE_NEG: f64 = 255.0;
const HUE_POS: f64 = 33.0;
/// A faint warm tint of the neutral centre.
const CENTRE_B: f64 = 0.012;

fn oklab_to_srgb(l: f64, a: f64, b: f64) -> Rgb {
    let l_ = l + 0.396_337_777_4 * a + 0.215_803_757_3 * b;
    let m_ = l - 0.105_561_345_8 * a - 0.063_854_172_8 * b;
    let s_ = l - 0.089_484_177_5 * a - 1.291_485_548_0 * b;
    let (l3, m3, s3) = (l_ * l_ * l_, m_ * m_ * m_, s_ * s_ * s_);
    let r = 4.076_741_662_1 * l3 - 3.307_711_591_3 * m3 + 0.230_969_929_2 * s3;
    let g = -1.268_438_004_6 * l3 + 2.609_757_401_1 * m3 - 0.341_319_396_5 * s3;
    let bl = -0.004_196_086_3 * l3 - 0.703_418_614_7 * m3 + 1.707_614_701_0 * s3;
    let encode = |v: f64| {
        let v = v.clamp(0.0, 1.0);
        let s = if v <= 0.003_130_8 {
            12.92 * v
        } else {
            1.055 * v.powf(1.0 / 2.4) - 0.055
        };
        (s * 255.0).round() as u8
    };
    [encode(r), encode(g), encode(bl)]
}

/// The colour of a similarity in [-1, 1] (values outside are clamped; NaN is mid grey).
pub fn diverging(v: f64) -> Rgb {
    if v.is_nan() {
        return [128, 128, 128];
    }
    let v = v.clamp(-1.0, 1.0);
    let t = v.abs();
    let l = L_ZERO - (L_ZERO - L_END) * t;
    let hue = if v < 0.0 { HUE_NEG } else { HUE_POS }.to_radians();
    let c = CHROMA * t;
    oklab_to_srgb(l, c * hue.cos(), c * hue.sin() + CENTRE_B * (1.0 - t))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn luminance(c: Rgb) -> f64 {
        let lin = |v: u8| {
            let s = v as f64 / 255.0;
            if s <= 0.04045 {
                s / 12.92
            } else {
                ((s + 0.055) / 1.055).powf(2.4)
            }
        };
        0.2126 * lin(c[0]) + 0.7152 * lin(c[1]) + 0.0722 * lin(c[2])
    }

    #[test]
    fn lightness_falls_evenly_from_the_centre_on_both_sides() {
        // Common practice for diverging scales: the centre is the lightest, and each side
        // darkens monotonically.
        let mut last = luminance(diverging(0.0));
        for i in 1..=20 {
            let v = i as f64 / 20.0;
            let (pos, neg) = (luminance(diverging(v)), luminance(diverging(-v)));
            assert!(pos < last + 1e-9 && neg < luminance(diverging(-(v - 0.05))) + 1e-9);
            assert!(
                (pos - neg).abs() < 0.05,
                "both ends equally dark at {v}: {pos} vs {neg}"
            );
            last = pos;
        }
        assert!(luminance(diverging(0.0)) > 0.85);
    }
}
