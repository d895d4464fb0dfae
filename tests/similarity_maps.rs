//! Similarity maps and the fidelity score, through the library API. The cosine values are
//! checked against a direct f64 computation of the textbook definition; the scores against
//! what any correct measure must do (identity scores 1, shuffling rows destroys structure).

mod common;

use posgrid::resample::{resample, Options};
use posgrid::similarity::{self, Grid, MapSet};

fn budget() -> similarity::Budget {
    similarity::Budget::memory(1 << 30)
}

fn f32s(v: &[f64]) -> Vec<f32> {
    v.iter().map(|x| *x as f32).collect()
}

#[test]
fn maps_equal_the_direct_cosine_similarity() {
    let (h, w, d) = (9, 7, 24);
    let rows = f32s(&common::noise(h * w * d, 3, 1.0));
    let g = Grid {
        rows: &rows,
        h,
        w,
        d,
    };
    let refs = [(0, 0), (4, 3), (8, 6), (2, 5)];
    let maps = similarity::maps(g, &refs).unwrap();
    for (&(r, c), map) in refs.iter().zip(&maps) {
        let a = &rows[(r * w + c) * d..][..d];
        for (i, v) in map.iter().enumerate() {
            let b = &rows[i * d..][..d];
            let dot: f64 = a.iter().zip(b).map(|(x, y)| *x as f64 * *y as f64).sum();
            let na: f64 = a.iter().map(|x| (*x as f64).powi(2)).sum::<f64>().sqrt();
            let nb: f64 = b.iter().map(|x| (*x as f64).powi(2)).sum::<f64>().sqrt();
            assert!(
                (*v as f64 - dot / (na * nb)).abs() < 1e-5,
                "ref ({r},{c}) cell {i}"
            );
        }
        assert!(
            (map[r * w + c] - 1.0).abs() < 1e-5,
            "a position is fully similar to itself"
        );
    }
}

#[test]
fn identity_scores_one() {
    let (h, w, d) = (14, 14, 32);
    let rows = f32s(&common::smooth_table(0, h, w, d, 4));
    let g = Grid {
        rows: &rows,
        h,
        w,
        d,
    };
    let (f, note) = similarity::score(g, g, 16, budget()).unwrap();
    assert!(
        (f.score.unwrap() - 1.0).abs() < 1e-9 && (f.min.unwrap() - 1.0).abs() < 1e-9,
        "{f:?}"
    );
    assert!(note.is_none());
    assert_eq!(f.refs, [14, 14], "no more references than cells");
}

#[test]
fn smooth_tables_score_high_and_shuffled_rows_score_low() {
    let (h, w, d) = (14, 14, 32);
    let rows = f32s(&common::smooth_table(0, h, w, d, 5));
    let before = Grid {
        rows: &rows,
        h,
        w,
        d,
    };
    let up = resample(&rows, (h, w), d, (24, 24), &Options::default()).unwrap();
    let after = Grid {
        rows: &up,
        h: 24,
        w: 24,
        d,
    };
    let good = similarity::score(before, after, 16, budget()).unwrap().0;
    let good = good.score.unwrap();
    assert!(good > 0.95, "{good:?}");

    // Shuffle the grid rows of the resized table: the positions no longer encode where.
    let mut order: Vec<usize> = (0..24 * 24).collect();
    let keys = common::noise(order.len(), 6, 1.0);
    order.sort_by(|a, b| keys[*a].partial_cmp(&keys[*b]).unwrap());
    let shuffled: Vec<f32> = order
        .iter()
        .flat_map(|&i| up[i * d..(i + 1) * d].to_vec())
        .collect();
    let bad = similarity::score(
        before,
        Grid {
            rows: &shuffled,
            h: 24,
            w: 24,
            d,
        },
        16,
        budget(),
    )
    .unwrap()
    .0;
    let bad = bad.score.unwrap();
    assert!(bad < 0.3, "{bad:?}");
    assert!(bad < good - 0.5);
}

#[test]
fn distance_profile_falls_for_a_smooth_table() {
    let (h, w, d) = (16, 16, 32);
    let rows = f32s(&common::smooth_table(0, h, w, d, 7));
    let set = MapSet::spread(
        Grid {
            rows: &rows,
            h,
            w,
            d,
        },
        8,
    )
    .unwrap();
    let m: Vec<f64> = set.profile.mean.iter().flatten().copied().collect();
    assert!(m[0] > 0.9, "nearest positions are most similar: {m:?}");
    assert!(m[0] > m[m.len() / 2], "{m:?}");
}

#[test]
fn the_png_has_the_expected_structure() {
    use posgrid::render::colour::diverging;
    let dir = tempfile::tempdir().unwrap();
    let d = 16;
    let table = common::smooth_table(1, 10, 10, d, 8);
    let input = common::write(
        dir.path(),
        "t.safetensors",
        &[common::floats(
            "pos_embed",
            safetensors::Dtype::F32,
            &[1, 101, d],
            &table,
        )],
        None,
    );
    let png = dir.path().join("m.png");
    let report =
        posgrid::figure::run(&input, None, &Default::default(), 16, &png, false, 1 << 30).unwrap();
    assert_eq!(report.refs, [10, 10]);
    let img = image::open(&png).unwrap().to_rgb8();
    assert_eq!(
        (img.width() as usize, img.height() as usize),
        (report.width, report.height)
    );
    assert!(img.width() < 4096 && img.height() < 4096);
    let distinct: std::collections::HashSet<[u8; 3]> = img.pixels().map(|p| p.0).collect();
    assert!(
        distinct.len() > 50,
        "non-uniform content: {} colours",
        distinct.len()
    );
    // The colour bar: a column holding both ends of the scale, +1 above -1.
    let (top, bottom) = (diverging(1.0), diverging(-1.0));
    let bar_column = (0..img.width()).find(|&x| {
        let col: Vec<[u8; 3]> = (0..img.height()).map(|y| img.get_pixel(x, y).0).collect();
        let t = col.iter().position(|c| *c == top);
        let b = col.iter().rposition(|c| *c == bottom);
        matches!((t, b), (Some(t), Some(b)) if b > t + 100)
    });
    assert!(bar_column.is_some(), "colour bar present");
    // Refuses to overwrite without force.
    assert!(
        posgrid::figure::run(&input, None, &Default::default(), 16, &png, false, 1 << 30).is_err()
    );
}

#[test]
fn zero_rows_make_the_similarity_undefined_not_perfect() {
    let (h, w, d) = (8, 8, 16);
    let mut rows = f32s(&common::smooth_table(0, h, w, d, 9));
    // Zero the row of the first reference cell (spread puts it at (0, 0) for 8 references).
    rows[..d].iter_mut().for_each(|v| *v = 0.0);
    let g = Grid {
        rows: &rows,
        h,
        w,
        d,
    };
    let (f, _) = similarity::score(g, g, 8, budget()).unwrap();
    assert_eq!(f.undefined, 1, "{f:?}");
    assert!((f.score.unwrap() - 1.0).abs() < 1e-9, "{f:?}");
    assert!(f.note("t").unwrap().contains("left out 1 of 64"));

    let zeros = vec![0.0f32; h * w * d];
    let z = Grid {
        rows: &zeros,
        h,
        w,
        d,
    };
    let (f, _) = similarity::score(z, z, 8, budget()).unwrap();
    assert_eq!(
        (f.score, f.min, f.worst, f.undefined),
        (None, None, None, 64)
    );
    assert!(f.note("t").unwrap().contains("undefined"));
}

#[test]
fn large_grids_get_fewer_references_within_the_budget() {
    let (h, w, d) = (300, 300, 2);
    let rows = f32s(&common::noise(h * w * d, 10, 1.0));
    let g = Grid {
        rows: &rows,
        h,
        w,
        d,
    };
    // Maps of 90 000 cells take 360 kB each: 8 MB leave room for only a few.
    let sets = similarity::map_sets(g, Some(g), 16, similarity::Budget::memory(8 << 20)).unwrap();
    let n = sets.before.ref_rows.len();
    assert!((1..16).contains(&n), "{n}");
    let held: usize = sets.before.maps.iter().map(Vec::len).sum::<usize>() * 2 * 4;
    assert!(held < 8 << 20, "{held}");
    assert!(sets.note.unwrap().contains("instead of 16x16"));
    // The time bound alone also cuts the count.
    let tight = similarity::Budget {
        memory: 1 << 30,
        work: 50 * (2 * 90_000) * 18,
    };
    let (f, note) = similarity::score(g, g, 16, tight).unwrap();
    assert!(f.refs[0] * f.refs[1] <= 50, "{f:?}");
    assert!(note.is_some());
    // Too little memory for even one reference is a refusal with the reason.
    let err = similarity::map_sets(g, Some(g), 16, similarity::Budget::memory(1 << 20))
        .err()
        .unwrap();
    assert!(err.to_string().contains("--memory-limit"), "{err}");
}
