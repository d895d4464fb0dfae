//! Every bilinear/bicubic option combination against golden files made by the onnx package's
//! reference evaluator (Resize, opset 19), stored by the reference safetensors library:
//! see fixtures/golden/make_resample_golden.py. Tolerance: 1e-5 of the largest |value|.

mod common;

use common::golden::{case_options, Golden};
use posgrid::resample::resample;

#[test]
fn every_option_combination_matches_the_onnx_reference() {
    let golden = Golden::open("fixtures/golden/resample_cases.safetensors");
    let cases = &golden.cases;
    assert!(cases.len() >= 150, "expected the full set of cases");
    let read = |name: &str| golden.read(name);
    let mut worst = 0.0f64;
    for case in cases {
        let name = case["name"].as_str().unwrap();
        let dims = |k: &str| {
            let v = case[k].as_array().unwrap();
            (
                v[0].as_u64().unwrap() as usize,
                v[1].as_u64().unwrap() as usize,
            )
        };
        let opts = case_options(case);
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
