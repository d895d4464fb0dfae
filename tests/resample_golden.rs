//! Every bilinear/bicubic option combination against golden files made by the onnx package's
//! reference evaluator (Resize, opset 19), stored by the reference safetensors library:
//! see fixtures/golden/make_resample_golden.py. Tolerance: 1e-5 of the largest |value|.

use posgrid::checkpoint::Checkpoint;
use posgrid::resample::{resample, Antialias, Coords, Edges, Kernel, Options};
use posgrid::values::decode_f32;

#[test]
fn every_option_combination_matches_the_onnx_reference() {
    let ckpt = Checkpoint::open("fixtures/golden/resample_cases.safetensors").unwrap();
    let meta = ckpt.metadata().unwrap();
    let cases_json = &meta.iter().find(|(k, _)| k == "cases").unwrap().1;
    let cases: Vec<serde_json::Value> = serde_json::from_str(cases_json).unwrap();
    assert!(cases.len() >= 150, "expected the full set of cases");
    let read = |name: &str| {
        let t = ckpt
            .tensor(name)
            .unwrap_or_else(|| panic!("{name} missing"));
        (
            decode_f32(t.dtype, &ckpt.read_bytes(t).unwrap()).unwrap(),
            t.shape.clone(),
        )
    };
    let mut worst = 0.0f64;
    for case in &cases {
        let name = case["name"].as_str().unwrap();
        let dims = |k: &str| {
            let v = case[k].as_array().unwrap();
            (
                v[0].as_u64().unwrap() as usize,
                v[1].as_u64().unwrap() as usize,
            )
        };
        let opts = Options {
            kernel: match case["mode"].as_str().unwrap() {
                "linear" => Kernel::Bilinear,
                "cubic" => Kernel::Bicubic,
                "nearest" => Kernel::Nearest,
                m => panic!("mode {m}"),
            },
            coords: match case["coordinate_transformation_mode"].as_str().unwrap() {
                "half_pixel" => Coords::HalfPixel,
                "align_corners" => Coords::AlignCorners,
                c => panic!("coords {c}"),
            },
            edges: if case["exclude_outside"] == 1 {
                Edges::Renormalize
            } else {
                Edges::Clamp
            },
            antialias: if case["antialias"] == 1 {
                Antialias::On
            } else {
                Antialias::Off
            },
            cubic_a: case["cubic_coeff_a"].as_f64().unwrap(),
        };
        let (input, in_shape) = read(&format!("{name}.input"));
        let (expected, out_shape) = read(&format!("{name}.output"));
        let d = in_shape[2];
        let got = resample(&input, dims("from"), d, dims("to"), &opts).unwrap();
        assert_eq!(
            got.len(),
            out_shape.iter().product::<usize>(),
            "{name}: size"
        );
        let scale = expected.iter().fold(0.0f64, |m, v| m.max(v.abs() as f64));
        for (i, (g, e)) in got.iter().zip(&expected).enumerate() {
            let err = (*g as f64 - *e as f64).abs() / scale;
            worst = worst.max(err);
            assert!(err <= 1e-5, "{name} {case} at {i}: got {g}, reference {e}");
        }
    }
    eprintln!(
        "worst relative error over {} cases: {worst:.2e}",
        cases.len()
    );
}
