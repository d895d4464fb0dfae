//! The rebuilt buffers and the geometric-progression resampling, each against a source outside
//! the code under test:
//! - geometric resampling: fixtures/golden/geometric_cases.safetensors, written by scipy's
//!   RectBivariateSpline (s = 0) and cross-checked there against 1-D not-a-knot CubicSplines
//!   (fixtures/golden/make_geometric_golden.py), read back with the reference safetensors crate;
//! - index buffers, shifted-window masks and rotary buffers: the published constructions (common
//!   practice), written again below in a different way — offsets numbered by enumeration,
//!   regions labelled by counting slices, angles from per-axis tables.

use std::collections::HashMap;

use posgrid::rebuild::relative_index::{self, IndexLayout};
use posgrid::rebuild::rotary::{self, RotaryParams, Which};
use posgrid::rebuild::shift_mask::{self, MaskLayout};
use posgrid::rebuild::RebuildError;
use posgrid::resample::geometric;
use safetensors::SafeTensors;

const LIMIT: usize = 1 << 28;

// ---------------------------------------------------------------------------------------------
// Geometric-progression resampling against scipy.

struct Golden {
    bytes: Vec<u8>,
}

impl Golden {
    fn open() -> Golden {
        let bytes = std::fs::read("fixtures/golden/geometric_cases.safetensors").unwrap();
        Golden { bytes }
    }

    fn cases(&self) -> Vec<(String, usize, usize)> {
        let (_, meta) = SafeTensors::read_metadata(&self.bytes).unwrap();
        let text = &meta.metadata().as_ref().unwrap()["cases"];
        let cases: Vec<serde_json::Value> = serde_json::from_str(text).unwrap();
        cases
            .iter()
            .map(|c| {
                let side = |k: &str| c[k].as_u64().unwrap() as usize;
                let name = c["name"].as_str().unwrap().to_string();
                (name, side("source_side"), side("target_side"))
            })
            .collect()
    }

    fn values(&self, name: &str) -> Vec<f64> {
        let tensors = SafeTensors::deserialize(&self.bytes).unwrap();
        let view = tensors.tensor(name).unwrap();
        assert_eq!(view.dtype(), safetensors::Dtype::F64, "{name}");
        view.data()
            .chunks_exact(8)
            .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
            .collect()
    }
}

fn largest_gap(got: &[f64], want: &[f64]) -> f64 {
    assert_eq!(got.len(), want.len());
    got.iter()
        .zip(want)
        .map(|(g, w)| (g - w).abs())
        .fold(0.0, f64::max)
}

#[test]
fn geometric_resampling_matches_scipy_bicubic_splines() {
    let golden = Golden::open();
    let cases = golden.cases();
    let sides: Vec<_> = cases.iter().map(|c| (c.1, c.2)).collect();
    assert_eq!(sides, [(13, 23), (27, 47), (23, 13)]);
    for (name, s, t) in cases {
        let plan = geometric::plan(s, t, LIMIT).unwrap();
        // The ratio and coordinates: the same arithmetic in Python floats (IEEE double).
        let ratio = golden.values(&format!("{name}.ratio"))[0];
        assert!(
            (plan.ratio - ratio).abs() <= 1e-12,
            "{name}: ratio {} vs {ratio}",
            plan.ratio
        );
        let source = golden.values(&format!("{name}.source_coords"));
        assert!(
            largest_gap(&plan.source, &source) <= 1e-12,
            "{name}: source coordinates"
        );
        assert_eq!(plan.target, golden.values(&format!("{name}.target_coords")));

        let input = golden.values(&format!("{name}.input"));
        let expected = golden.values(&format!("{name}.output"));
        let out = geometric::resample(&input, s, 3, t, LIMIT).unwrap();
        let scale = expected.iter().fold(0.0f64, |m, v| m.max(v.abs()));
        let gap = largest_gap(&out, &expected);
        assert!(
            gap <= 1e-9 * scale,
            "{name}: largest gap {gap:e} (scale {scale})"
        );
    }
}

#[test]
fn geometric_resampling_keeps_the_centre_row_and_refuses_bad_requests() {
    // At the centre offset (0, 0) source and target coordinates coincide: the value is kept.
    let golden = Golden::open();
    let input = golden.values("s13_t23.input");
    let out = geometric::resample(&input, 13, 3, 23, LIMIT).unwrap();
    for c in 0..3 {
        let (src, dst) = (input[(6 * 13 + 6) * 3 + c], out[(11 * 23 + 11) * 3 + c]);
        assert!((src - dst).abs() < 1e-12);
    }
    assert!(geometric::resample(&input, 13, 3, 24, LIMIT).is_err());
    assert!(geometric::resample(&input, 13, 3, 23, 23 * 23 * 3 - 1).is_err());
    assert!(geometric::resample(&input[1..], 13, 3, 23, LIMIT).is_err());
    assert!(geometric::resample(&input, 13, 3, 1001, LIMIT).is_err());
}

// ---------------------------------------------------------------------------------------------
// Window-relative index buffers against an enumeration of offsets.

/// Number every offset `(dy, dx)` of a window in row-major order (dy outer, both ascending),
/// then look up each pair of positions; BEiT-style class rows are the next three numbers
/// (class→token, token→class, class→class), the class token first in the buffer.
fn index_by_enumeration(wh: usize, ww: usize, class_rows: bool) -> Vec<i64> {
    let (wh, ww) = (wh as i64, ww as i64);
    let mut number = HashMap::new();
    for dy in -(wh - 1)..=(wh - 1) {
        for dx in -(ww - 1)..=(ww - 1) {
            let next = number.len() as i64;
            number.insert((dy, dx), next);
        }
    }
    let positions: Vec<(i64, i64)> = (0..wh).flat_map(|y| (0..ww).map(move |x| (y, x))).collect();
    let mut rows: Vec<Vec<i64>> = positions
        .iter()
        .map(|a| {
            positions
                .iter()
                .map(|b| number[&(a.0 - b.0, a.1 - b.1)])
                .collect()
        })
        .collect();
    if class_rows {
        let m = number.len() as i64;
        for row in rows.iter_mut() {
            row.insert(0, m + 1);
        }
        let mut first = vec![m; positions.len() + 1];
        first[0] = m + 2;
        rows.insert(0, first);
    }
    rows.concat()
}

#[test]
fn index_buffers_match_the_enumerated_offsets() {
    for window in [(7, 7), (12, 12), (3, 5)] {
        for class_rows in [false, true] {
            let layout = IndexLayout { window, class_rows };
            let built = relative_index::build(layout, LIMIT).unwrap();
            let expected = index_by_enumeration(window.0, window.1, class_rows);
            assert_eq!(built, expected, "{layout:?}");
            let side = layout.side().unwrap();
            assert_eq!(relative_index::layouts_of(&built, side), [layout]);
            let rows = layout.table_rows().unwrap() as i64;
            assert_eq!(
                *built.iter().max().unwrap(),
                rows - 1,
                "{layout:?} uses every row"
            );
        }
    }
}

#[test]
fn index_checker_rejects_other_windows_and_damaged_buffers() {
    let seven = IndexLayout {
        window: (7, 7),
        class_rows: false,
    };
    let mut buffer = relative_index::build(seven, LIMIT).unwrap();
    for other in [(1, 49), (49, 1)] {
        let layout = IndexLayout {
            window: other,
            class_rows: false,
        };
        assert!(!relative_index::fits(&buffer, 49, layout), "{other:?}");
    }
    buffer[49 * 20 + 33] += 1;
    assert!(relative_index::layouts_of(&buffer, 49).is_empty());
    // 1×N and N×1 windows index the same way: both are reported.
    let row = IndexLayout {
        window: (1, 6),
        class_rows: false,
    };
    let column = IndexLayout {
        window: (6, 1),
        class_rows: false,
    };
    let line = relative_index::build(row, LIMIT).unwrap();
    assert_eq!(relative_index::layouts_of(&line, 6), [row, column]);
}

// ---------------------------------------------------------------------------------------------
// Shifted-window masks against region labels counted over slices.

/// Label the map by counting over the three slices per axis (`[0, H−Wh)`, `[H−Wh, H−sh)`,
/// `[H−sh, H)`), cut it into windows, and mask pairs whose labels differ.
fn mask_by_slices(h: usize, w: usize, win: usize, shift: usize) -> Vec<f32> {
    let slices = |side: usize| {
        [
            (0, side - win),
            (side - win, side - shift),
            (side - shift, side),
        ]
    };
    let mut label = vec![vec![0usize; w]; h];
    let mut count = 0;
    for (y0, y1) in slices(h) {
        for (x0, x1) in slices(w) {
            for row in &mut label[y0..y1] {
                for cell in &mut row[x0..x1] {
                    *cell = count;
                }
            }
            count += 1;
        }
    }
    let mut mask = Vec::new();
    for wy in (0..h).step_by(win) {
        for wx in (0..w).step_by(win) {
            let labels: Vec<usize> = (0..win * win)
                .map(|c| label[wy + c / win][wx + c % win])
                .collect();
            for a in &labels {
                mask.extend(labels.iter().map(|b| if a == b { 0.0 } else { -100.0 }));
            }
        }
    }
    mask
}

fn square(map: usize, win: usize, shift: usize) -> MaskLayout {
    MaskLayout {
        map: (map, map),
        window: (win, win),
        shift: (shift, shift),
    }
}

#[test]
fn shifted_window_masks_match_the_slice_labels() {
    // Stage maps of a window-7 hierarchy at 224 px (56, 28, 14) and a window-12 one at 384 px
    // (48, 24), shift half the window (common practice).
    for (map, win) in [(56, 7), (28, 7), (14, 7), (48, 12), (24, 12)] {
        let layout = square(map, win, win / 2);
        let mask = shift_mask::build(layout, LIMIT).unwrap().unwrap();
        let nw = (map / win) * (map / win);
        assert_eq!(mask.len(), nw * win.pow(4));
        assert_eq!(mask, mask_by_slices(map, map, win, win / 2), "{layout:?}");
        assert_eq!(shift_mask::layouts_of(&mask, nw, win * win), [layout]);
    }
}

#[test]
fn no_mask_without_a_shift_and_errors_for_maps_that_do_not_split() {
    // The last stage, where one window covers the map, has no shift and no mask.
    assert_eq!(shift_mask::build(square(7, 7, 3), LIMIT), Ok(None));
    assert_eq!(shift_mask::build(square(12, 12, 6), LIMIT), Ok(None));
    assert_eq!(shift_mask::build(square(56, 7, 0), LIMIT), Ok(None));
    assert!(matches!(
        shift_mask::build(square(24, 7, 3), LIMIT),
        Err(RebuildError::MapNotDivisible { .. })
    ));
    assert!(matches!(
        shift_mask::build(square(56, 7, 3), 1000),
        Err(RebuildError::TooLarge { .. })
    ));
}

#[test]
fn mask_checker_rejects_damaged_masks() {
    let mut mask = shift_mask::build(square(14, 7, 3), LIMIT).unwrap().unwrap();
    assert!(!shift_mask::fits(&mask, square(14, 7, 2)));
    assert!(!shift_mask::fits(&mask, square(28, 7, 3)));
    mask[49 * 49 + 10] = if mask[49 * 49 + 10] == 0.0 {
        -100.0
    } else {
        0.0
    };
    assert!(shift_mask::layouts_of(&mask, 4, 49).is_empty());
    assert!(shift_mask::layouts_of(&vec![0.0; 4 * 49 * 49], 4, 49).is_empty());
}

// ---------------------------------------------------------------------------------------------
// Rotary buffers against per-axis angle tables.

const ROPE: RotaryParams = RotaryParams {
    theta: 10000.0,
    pretrain_side: 16.0,
    axis_dim: 32,
};

/// One angle table per axis (`[G, d]`: positions times pairwise-repeated frequencies), the row
/// of cell (i, j) being the row-axis row i joined to the column-axis row j.
fn rotary_by_axis_tables(g: usize, p: &RotaryParams) -> (Vec<f64>, Vec<f64>) {
    let freqs: Vec<f64> = (0..p.axis_dim)
        .map(|c| 1.0 / p.theta.powf((c - c % 2) as f64 / p.axis_dim as f64))
        .collect();
    let axis: Vec<Vec<f64>> = (0..g)
        .map(|i| {
            let t = p.pretrain_side * i as f64 / g as f64;
            freqs.iter().map(|f| t * f).collect()
        })
        .collect();
    let angles: Vec<f64> = (0..g * g)
        .flat_map(|cell| [axis[cell / g].clone(), axis[cell % g].clone()].concat())
        .collect();
    (
        angles.iter().map(|a| a.cos()).collect(),
        angles.iter().map(|a| a.sin()).collect(),
    )
}

#[test]
fn rotary_buffers_match_the_axis_tables() {
    for g in [16, 24] {
        let (cos, sin) = rotary::build(g, &ROPE, LIMIT).unwrap();
        let (want_cos, want_sin) = rotary_by_axis_tables(g, &ROPE);
        assert_eq!(cos.len(), g * g * 64);
        assert!(largest_gap(&cos, &want_cos) < 1e-12, "cos at G={g}");
        assert!(largest_gap(&sin, &want_sin) < 1e-12, "sin at G={g}");
    }
}

fn rounded_to_f32(v: &[f64]) -> Vec<f64> {
    v.iter().map(|&x| x as f32 as f64).collect()
}

#[test]
fn rotary_parameters_are_recovered_from_either_buffer_or_both() {
    for g in [16, 24] {
        let (cos, sin) = rotary::build(g, &ROPE, LIMIT).unwrap();
        let rows = g * g;
        // f64 values, and values stored in f32 (the tolerance grows by one rounding step).
        for (cos, sin, tol) in [
            (cos.clone(), sin.clone(), 1e-4),
            (rounded_to_f32(&cos), rounded_to_f32(&sin), 1e-4 + 6e-8),
        ] {
            assert_eq!(
                rotary::recognise_pair(&cos, &sin, rows, 64, tol),
                Some(ROPE)
            );
            assert_eq!(
                rotary::recognise(&cos, rows, 64, Which::Cos, tol),
                Some(ROPE)
            );
            assert_eq!(
                rotary::recognise(&sin, rows, 64, Which::Sin, tol),
                Some(ROPE)
            );
        }
    }
}

#[test]
fn a_recognised_buffer_rebuilds_for_a_new_grid() {
    let (cos, sin) = rotary::build(16, &ROPE, LIMIT).unwrap();
    let params = rotary::recognise_pair(&cos, &sin, 256, 64, 1e-4).unwrap();
    let (cos24, sin24) = rotary::build(24, &params, LIMIT).unwrap();
    let (want_cos, want_sin) = rotary_by_axis_tables(24, &ROPE);
    assert!(largest_gap(&cos24, &want_cos) < 1e-12);
    assert!(largest_gap(&sin24, &want_sin) < 1e-12);
}

#[test]
fn rotary_recognition_rejects_perturbed_and_random_buffers() {
    let (cos, sin) = rotary::build(16, &ROPE, LIMIT).unwrap();
    for index in [0, 64 + 32, 64 * 100 + 7, 256 * 64 - 1] {
        for (which, buffer) in [(Which::Cos, &cos), (Which::Sin, &sin)] {
            let mut damaged = buffer.clone();
            damaged[index] += 1e-3;
            assert_eq!(
                rotary::recognise(&damaged, 256, 64, which, 1e-4),
                None,
                "{index}"
            );
            let pair = match which {
                Which::Cos => rotary::recognise_pair(&damaged, &sin, 256, 64, 1e-4),
                Which::Sin => rotary::recognise_pair(&cos, &damaged, 256, 64, 1e-4),
            };
            assert_eq!(pair, None, "{index}");
        }
    }
    // Values from a fixed-seed generator (splitmix64), uniform in [-1, 1).
    let mut state = 0x5eed_u64;
    let random: Vec<f64> = (0..256 * 64)
        .map(|_| {
            state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
            let mut z = state;
            z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
            (z ^ (z >> 31)) as f64 / u64::MAX as f64 * 2.0 - 1.0
        })
        .collect();
    assert_eq!(rotary::recognise(&random, 256, 64, Which::Cos, 1e-4), None);
    assert_eq!(rotary::recognise(&random, 256, 64, Which::Sin, 1e-4), None);
    assert_eq!(rotary::recognise_pair(&random, &sin, 256, 64, 1e-4), None);
    // A non-square row count is not this construction.
    assert_eq!(
        rotary::recognise(&cos[..255 * 64], 255, 64, Which::Cos, 1e-4),
        None
    );
}

#[test]
fn rotary_recognition_across_bases_widths_and_sides() {
    // Stored in f32; angles of cell (0, 1) within the readable range (L/G at most π, or π/2
    // from a sine buffer alone). Integers come back exactly (snapped), others within 1e-6.
    for theta in [100.0, 10000.0, 12345.678] {
        for axis_dim in [8, 16, 64] {
            for pretrain_side in [7.0, 14.0, 16.0, 24.0, 16.5] {
                for g in [8, 16, 24, 32] {
                    let p = RotaryParams {
                        theta,
                        pretrain_side,
                        axis_dim,
                    };
                    let (cos, sin) = rotary::build(g, &p, LIMIT).unwrap();
                    let (cos, sin) = (rounded_to_f32(&cos), rounded_to_f32(&sin));
                    let (rows, width, tol) = (g * g, 2 * axis_dim, 1e-4 + 6e-8);
                    let step = pretrain_side / g as f64;
                    let mut found = vec![
                        rotary::recognise_pair(&cos, &sin, rows, width, tol),
                        rotary::recognise(&cos, rows, width, Which::Cos, tol),
                    ];
                    if step <= std::f64::consts::FRAC_PI_2 {
                        found.push(rotary::recognise(&sin, rows, width, Which::Sin, tol));
                    }
                    for q in found {
                        let q = q.unwrap_or_else(|| panic!("{p:?} at G={g} not recognised"));
                        let near = |a: f64, b: f64| ((a - b) / b).abs() <= 1e-6;
                        assert!(near(q.theta, theta) && near(q.pretrain_side, pretrain_side));
                        assert_eq!(q.axis_dim, axis_dim);
                        if theta.fract() == 0.0 && pretrain_side.fract() == 0.0 {
                            assert_eq!(q, p, "at G={g}");
                        }
                    }
                }
            }
        }
    }
}

/// Uniform values in [-1, 1) from a fixed-seed splitmix64 generator.
fn noise(seed: u64, n: usize) -> Vec<f64> {
    let mut state = seed;
    (0..n)
        .map(|_| {
            state = state.wrapping_add(0x9e37_79b9_7f4a_7c15);
            let mut z = state;
            z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
            (z ^ (z >> 31)) as f64 / u64::MAX as f64 * 2.0 - 1.0
        })
        .collect()
}

#[test]
fn checkers_and_builders_answer_every_input_without_panicking() {
    let specials = [f64::NAN, f64::INFINITY, -f64::INFINITY, 0.0, -100.0, 1e300];
    for (seed, len) in [
        (1u64, 0usize),
        (2, 1),
        (3, 16),
        (4, 64),
        (5, 196),
        (6, 1024),
    ] {
        let mut values = noise(seed, len);
        for (v, s) in values.iter_mut().zip(specials.iter().cycle()).step_by(7) {
            *v = *s;
        }
        let ints: Vec<i64> = values.iter().map(|v| (v * 50.0) as i64).collect();
        let floats: Vec<f32> = values.iter().map(|&v| v as f32).collect();
        for shape in [0, 1, 2, 3, 4, 7, 8, 14, 16, 32, usize::MAX] {
            // A single 0 is the index of a 1x1 window; nothing else here is an index.
            assert!(relative_index::layouts_of(&ints, shape).is_empty() || ints == [0]);
            assert!(shift_mask::layouts_of(&floats, shape, 2).is_empty());
            assert!(shift_mask::layouts_of(&floats, 2, shape).is_empty());
            for which in [Which::Cos, Which::Sin] {
                assert_eq!(rotary::recognise(&values, shape, 8, which, 1e-4), None);
                assert_eq!(rotary::recognise(&values, 4, shape, which, f64::NAN), None);
            }
            assert_eq!(
                rotary::recognise_pair(&values, &values, shape, 16, 1e-4),
                None
            );
            let _ = geometric::resample(&values, shape, 1, 7, LIMIT);
            let _ = geometric::resample(&values, 3, shape, 5, LIMIT);
        }
    }
    for side in [0, 1, 2, 3, 5, 1 << 20, usize::MAX] {
        for target in [0, 1, 3, 5, 7, 1 << 20 | 1, usize::MAX] {
            let _ = geometric::plan(side, target, LIMIT);
            let _ = geometric::ratio(side, target);
        }
        let window = (side, side);
        let _ = relative_index::build(
            IndexLayout {
                window,
                class_rows: true,
            },
            LIMIT,
        );
        let _ = shift_mask::build(square(side, side.max(1), 1), LIMIT);
        let p = RotaryParams {
            axis_dim: side,
            ..ROPE
        };
        let _ = rotary::build(side, &p, LIMIT);
    }
}
