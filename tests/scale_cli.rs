//! `resize --scale` end to end against the tensor framework's interpolate called with a float
//! scale factor (fixtures/golden/scale_cases.safetensors, written by
//! fixtures/golden/make_scale_golden.py with torch 2.15; `recompute_scale_factor` False or None,
//! so the size is floor(in·s) and the coordinates use s itself).

mod common;

use common::golden::Golden;
use common::*;
use posgrid::checkpoint::{Checkpoint, TensorSource};
use safetensors::Dtype;

fn values(ckpt: &Checkpoint, name: &str) -> Vec<f64> {
    let e = ckpt.find(name).unwrap();
    posgrid::values::decode_f64(e.dtype, &ckpt.bytes(e).unwrap()).unwrap()
}

#[test]
fn scale_factors_match_the_framework_interpolate_with_a_float_scale() {
    let golden = Golden::open("fixtures/golden/scale_cases.safetensors");
    let mut checked = 0;
    for case in golden.cases.iter().filter(|c| c["source"] == "torch") {
        // Where floor(in·s) keeps a side but s != 1, some framework modes copy that axis as
        // if s were 1 (recorded by the generator); posgrid samples with s, as the standard does.
        if case["kept_axes_copied"]
            .as_array()
            .unwrap()
            .iter()
            .any(|v| v == true)
            || case["coordinate_transformation_mode"] != "half_pixel"
        {
            continue;
        }
        let from: Vec<usize> = serde_json::from_value(case["from"].clone()).unwrap();
        let to: Vec<usize> = serde_json::from_value(case["to"].clone()).unwrap();
        let text: Vec<String> = serde_json::from_value(case["scale_text"].clone()).unwrap();
        let (input, _) = golden.read_f64(case["input"].as_str().unwrap());
        let (expected, _) = golden.read_f64(&format!("{}.output", case["name"].as_str().unwrap()));
        let dir = tempfile::tempdir().unwrap();
        let file = write(
            dir.path(),
            "in.safetensors",
            &[floats(
                "pos_embed",
                Dtype::F64,
                &[1, from[0] * from[1], 1],
                &input,
            )],
            None,
        );
        let out = dir.path().join("out.safetensors");
        let bicubic = case["mode"] == "bicubic";
        let antialias = case["antialias"] == 1;
        // The framework's antialiased bicubic is a = -0.5 with outside taps dropped (README).
        let mut args = vec![
            "resize".to_string(),
            s(&file).into(),
            "-o".into(),
            s(&out).into(),
            "--source-grid".into(),
            format!("{}x{}", from[0], from[1]),
            "--slots".into(),
            "0".into(),
            "--scale".into(),
            format!("{}x{}", text[0], text[1]),
            "--kernel".into(),
            (if bicubic { "bicubic" } else { "bilinear" }).into(),
            "--antialias".into(),
            (if antialias { "on" } else { "off" }).into(),
        ];
        if antialias {
            args.extend(["--edges".into(), "renormalize".into()]);
            if bicubic {
                args.extend(["--cubic-a".into(), "-0.5".into()]);
            }
        }
        let o = posgrid(&args);
        assert_eq!(code(&o), 0, "{}: {}", case["name"], stderr(&o));
        let got_ckpt = Checkpoint::open(&out).unwrap();
        let got_entry = got_ckpt.find("pos_embed").unwrap();
        assert_eq!(
            got_entry.shape,
            vec![1, to[0] * to[1], 1],
            "{}",
            case["name"]
        );
        let got = values(&got_ckpt, "pos_embed");
        let scale = expected.iter().fold(0f64, |m, v| m.max(v.abs()));
        let worst = got
            .iter()
            .zip(&expected)
            .fold(0f64, |m, (a, b)| m.max((a - b).abs()));
        assert!(
            worst <= 1e-5 * scale,
            "{} ({}): {worst} over 1e-5 of {scale}",
            case["name"],
            case["scale_kind"]
        );
        checked += 1;
    }
    assert!(checked >= 10, "only {checked} cases checked");
}

#[test]
fn scale_text_is_checked() {
    let dir = tempfile::tempdir().unwrap();
    let file = write(
        dir.path(),
        "in.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 17, 4],
            &noise(68, 1, 0.1),
        )],
        None,
    );
    for bad in ["0", "-1.5", "1/0", "x", "nan", "2x", "1e400"] {
        let o = posgrid(&[
            "resize",
            s(&file),
            "-o",
            s(&dir.path().join("o.safetensors")),
            "--scale",
            bad,
        ]);
        assert_eq!(code(&o), 2, "{bad}: {}", stderr(&o));
    }
    // A scale that leaves no row is a usage error naming the table.
    let o = posgrid(&[
        "resize",
        s(&file),
        "-o",
        s(&dir.path().join("o.safetensors")),
        "--scale",
        "0.1",
    ]);
    assert_eq!(code(&o), 2, "{}", stderr(&o));
    assert!(stderr(&o).contains("pos_embed"), "{}", stderr(&o));
    assert_eq!(entries(dir.path()), ["in.safetensors"]);
}
