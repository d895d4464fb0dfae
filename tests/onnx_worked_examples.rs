//! The worked examples published with the ONNX Resize operator (operator documentation and the
//! onnx package's backend test cases, `onnx/backend/test/case/node/resize.py`, onnx 1.23),
//! transcribed as check values. Each example resizes a 1-channel image, so D = 1 here.

use posgrid::resample::{resample, Antialias, Coords, Edges, Kernel, Options};

const RAMP_4X4: [f32; 16] = [
    1., 2., 3., 4., 5., 6., 7., 8., 9., 10., 11., 12., 13., 14., 15., 16.,
];

fn opts(kernel: Kernel, coords: Coords) -> Options {
    Options {
        kernel,
        coords,
        edges: Edges::Clamp,
        antialias: Antialias::Off,
        ..Options::default()
    }
}

/// Published values carry 8 significant digits (7 for the antialiased ones).
fn check(name: &str, got: &[f32], expected: &[f64], tol: f64) {
    assert_eq!(got.len(), expected.len(), "{name}: length");
    for (i, (g, e)) in got.iter().zip(expected).enumerate() {
        assert!(
            (*g as f64 - e).abs() <= tol,
            "{name}[{i}]: got {g}, published {e}"
        );
    }
}

#[test]
fn upsample_scales_cubic_4x4_to_8x8_half_pixel() {
    // resize_upsample_scales_cubic: mode cubic, half_pixel, a = -0.75, scales 2.
    let expected = [
        0.47265625,
        0.76953125,
        1.24609375,
        1.875,
        2.28125,
        2.91015625,
        3.38671875,
        3.68359375,
        1.66015625,
        1.95703125,
        2.43359375,
        3.0625,
        3.46875,
        4.09765625,
        4.57421875,
        4.87109375,
        3.56640625,
        3.86328125,
        4.33984375,
        4.96875,
        5.375,
        6.00390625,
        6.48046875,
        6.77734375,
        6.08203125,
        6.37890625,
        6.85546875,
        7.484375,
        7.890625,
        8.51953125,
        8.99609375,
        9.29296875,
        7.70703125,
        8.00390625,
        8.48046875,
        9.109375,
        9.515625,
        10.14453125,
        10.62109375,
        10.91796875,
        10.22265625,
        10.51953125,
        10.99609375,
        11.625,
        12.03125,
        12.66015625,
        13.13671875,
        13.43359375,
        12.12890625,
        12.42578125,
        12.90234375,
        13.53125,
        13.9375,
        14.56640625,
        15.04296875,
        15.33984375,
        13.31640625,
        13.61328125,
        14.08984375,
        14.71875,
        15.125,
        15.75390625,
        16.23046875,
        16.52734375,
    ];
    let got = resample(
        &RAMP_4X4,
        (4, 4),
        1,
        (8, 8),
        &opts(Kernel::Bicubic, Coords::HalfPixel),
    )
    .unwrap();
    check("cubic half_pixel", &got, &expected, 1e-5);
}

#[test]
fn upsample_scales_cubic_4x4_to_8x8_align_corners() {
    // resize_upsample_scales_cubic_align_corners.
    let expected = [
        1.0,
        1.34110787,
        1.80029155,
        2.32944606,
        2.67055394,
        3.19970845,
        3.65889213,
        4.0,
        2.36443149,
        2.70553936,
        3.16472303,
        3.69387755,
        4.03498542,
        4.56413994,
        5.02332362,
        5.36443149,
        4.20116618,
        4.54227405,
        5.00145773,
        5.53061224,
        5.87172012,
        6.40087464,
        6.86005831,
        7.20116618,
        6.31778426,
        6.65889213,
        7.1180758,
        7.64723032,
        7.98833819,
        8.51749271,
        8.97667638,
        9.31778426,
        7.68221574,
        8.02332362,
        8.48250729,
        9.01166181,
        9.35276968,
        9.8819242,
        10.34110787,
        10.68221574,
        9.79883382,
        10.13994169,
        10.59912536,
        11.12827988,
        11.46938776,
        11.99854227,
        12.45772595,
        12.79883382,
        11.63556851,
        11.97667638,
        12.43586006,
        12.96501458,
        13.30612245,
        13.83527697,
        14.29446064,
        14.63556851,
        13.0,
        13.34110787,
        13.80029155,
        14.32944606,
        14.67055394,
        15.19970845,
        15.65889213,
        16.0,
    ];
    let got = resample(
        &RAMP_4X4,
        (4, 4),
        1,
        (8, 8),
        &opts(Kernel::Bicubic, Coords::AlignCorners),
    )
    .unwrap();
    check("cubic align_corners", &got, &expected, 1e-5);
}

#[test]
fn upsample_sizes_cubic_4x4_to_9x10() {
    // resize_upsample_sizes_cubic: a non-integer, unequal scale per axis.
    let expected = [
        0.45507922,
        0.64057922,
        0.97157922,
        1.42257922,
        1.90732922,
        2.22332922,
        2.70807922,
        3.15907922,
        3.49007922,
        3.67557922,
        1.39437963,
        1.57987963,
        1.91087963,
        2.36187963,
        2.84662963,
        3.16262963,
        3.64737963,
        4.09837963,
        4.42937963,
        4.61487963,
        2.95130693,
        3.13680693,
        3.46780693,
        3.91880693,
        4.40355693,
        4.71955693,
        5.20430693,
        5.65530693,
        5.98630693,
        6.17180693,
        5.20525069,
        5.39075069,
        5.72175069,
        6.17275069,
        6.65750069,
        6.97350069,
        7.45825069,
        7.90925069,
        8.24025069,
        8.42575069,
        6.88975,
        7.07525,
        7.40625,
        7.85725,
        8.342,
        8.658,
        9.14275,
        9.59375,
        9.92475,
        10.11025,
        8.57424931,
        8.75974931,
        9.09074931,
        9.54174931,
        10.02649931,
        10.34249931,
        10.82724931,
        11.27824931,
        11.60924931,
        11.79474931,
        10.82819307,
        11.01369307,
        11.34469307,
        11.79569307,
        12.28044307,
        12.59644307,
        13.08119307,
        13.53219307,
        13.86319307,
        14.04869307,
        12.38512037,
        12.57062037,
        12.90162037,
        13.35262037,
        13.83737037,
        14.15337037,
        14.63812037,
        15.08912037,
        15.42012037,
        15.60562037,
        13.32442078,
        13.50992078,
        13.84092078,
        14.29192078,
        14.77667078,
        15.09267078,
        15.57742078,
        16.02842078,
        16.35942078,
        16.54492078,
    ];
    let got = resample(
        &RAMP_4X4,
        (4, 4),
        1,
        (9, 10),
        &opts(Kernel::Bicubic, Coords::HalfPixel),
    )
    .unwrap();
    check("cubic sizes 9x10", &got, &expected, 1e-5);
}

#[test]
fn downsample_sizes_cubic_4x4_to_3x3() {
    // resize_downsample_sizes_cubic: shrinking without antialias.
    let expected = [
        1.63078704,
        3.00462963,
        4.37847222,
        7.12615741,
        8.5,
        9.87384259,
        12.62152778,
        13.99537037,
        15.36921296,
    ];
    let got = resample(
        &RAMP_4X4,
        (4, 4),
        1,
        (3, 3),
        &opts(Kernel::Bicubic, Coords::HalfPixel),
    )
    .unwrap();
    check("cubic down 3x3", &got, &expected, 1e-5);
}

#[test]
fn upsample_cubic_a_minus_half_exclude_outside() {
    // resize_upsample_scales_cubic_A_n0p5_exclude_outside: a = -0.5, exclude_outside = 1.
    let expected = [
        0.55882353,
        0.81494204,
        1.35698249,
        1.89705882,
        2.39705882,
        2.93713516,
        3.47917561,
        3.73529412,
        1.58329755,
        1.83941606,
        2.38145651,
        2.92153285,
        3.42153285,
        3.96160918,
        4.50364964,
        4.75976814,
        3.75145936,
        4.00757787,
        4.54961832,
        5.08969466,
        5.58969466,
        6.12977099,
        6.67181144,
        6.92792995,
        5.91176471,
        6.16788321,
        6.70992366,
        7.25,
        7.75,
        8.29007634,
        8.83211679,
        9.08823529,
        7.91176471,
        8.16788321,
        8.70992366,
        9.25,
        9.75,
        10.29007634,
        10.83211679,
        11.08823529,
        10.07207005,
        10.32818856,
        10.87022901,
        11.41030534,
        11.91030534,
        12.45038168,
        12.99242213,
        13.24854064,
        12.24023186,
        12.49635036,
        13.03839082,
        13.57846715,
        14.07846715,
        14.61854349,
        15.16058394,
        15.41670245,
        13.26470588,
        13.52082439,
        14.06286484,
        14.60294118,
        15.10294118,
        15.64301751,
        16.18505796,
        16.44117647,
    ];
    let o = Options {
        kernel: Kernel::Bicubic,
        coords: Coords::HalfPixel,
        edges: Edges::Renormalize,
        antialias: Antialias::Off,
        cubic_a: -0.5,
    };
    let got = resample(&RAMP_4X4, (4, 4), 1, (8, 8), &o).unwrap();
    check("cubic a=-0.5 exclude_outside", &got, &expected, 1e-5);
}

#[test]
fn upsample_linear_2x2_to_4x4_both_coordinate_modes() {
    // resize_upsample_scales_linear and resize_upsample_scales_linear_align_corners.
    let src = [1.0f32, 2., 3., 4.];
    let half = [
        1., 1.25, 1.75, 2., 1.5, 1.75, 2.25, 2.5, 2.5, 2.75, 3.25, 3.5, 3., 3.25, 3.75, 4.,
    ];
    let got = resample(
        &src,
        (2, 2),
        1,
        (4, 4),
        &opts(Kernel::Bilinear, Coords::HalfPixel),
    )
    .unwrap();
    check("linear half_pixel", &got, &half, 1e-6);
    let corners = [
        1., 1.33333333, 1.66666667, 2., 1.66666667, 2., 2.33333333, 2.66666667, 2.33333333,
        2.66666667, 3., 3.33333333, 3., 3.33333333, 3.66666667, 4.,
    ];
    let got = resample(
        &src,
        (2, 2),
        1,
        (4, 4),
        &opts(Kernel::Bilinear, Coords::AlignCorners),
    )
    .unwrap();
    check("linear align_corners", &got, &corners, 1e-6);
}

#[test]
fn antialiased_downsampling_4x4_to_3x3() {
    // resize_downsample_sizes_linear_antialias and resize_downsample_sizes_cubic_antialias
    // (antialias = 1, a = -0.75, edge clamp); published with 7-8 significant digits.
    let linear = [
        2.3636363, 3.590909, 4.818182, 7.2727275, 8.5, 9.727273, 12.181818, 13.409091, 14.636364,
    ];
    let mut o = opts(Kernel::Bilinear, Coords::HalfPixel);
    o.antialias = Antialias::On;
    let got = resample(&RAMP_4X4, (4, 4), 1, (3, 3), &o).unwrap();
    check("linear antialias", &got, &linear, 1e-5);
    let cubic = [
        1.7750092, 3.1200073, 4.4650054, 7.1550016, 8.5, 9.844998, 12.534994, 13.8799925, 15.224991,
    ];
    o.kernel = Kernel::Bicubic;
    let got = resample(&RAMP_4X4, (4, 4), 1, (3, 3), &o).unwrap();
    check("cubic antialias", &got, &cubic, 1e-5);
    // `auto` switches antialiasing on for these shrinking axes, so it gives the same values.
    o.antialias = Antialias::Auto;
    let got = resample(&RAMP_4X4, (4, 4), 1, (3, 3), &o).unwrap();
    check("cubic antialias auto", &got, &cubic, 1e-5);
}

#[test]
fn nearest_round_prefer_floor() {
    // resize_upsample_sizes_nearest (2x2 → 7x8) and resize_downsample_sizes_nearest (2x4 → 1x3).
    let up = [
        1., 1., 1., 1., 2., 2., 2., 2., 1., 1., 1., 1., 2., 2., 2., 2., 1., 1., 1., 1., 2., 2., 2.,
        2., 1., 1., 1., 1., 2., 2., 2., 2., 3., 3., 3., 3., 4., 4., 4., 4., 3., 3., 3., 3., 4., 4.,
        4., 4., 3., 3., 3., 3., 4., 4., 4., 4.,
    ];
    let got = resample(
        &[1.0f32, 2., 3., 4.],
        (2, 2),
        1,
        (7, 8),
        &opts(Kernel::Nearest, Coords::HalfPixel),
    )
    .unwrap();
    check("nearest up", &got, &up, 0.0);
    let src = [1.0f32, 2., 3., 4., 5., 6., 7., 8.];
    let got = resample(
        &src,
        (2, 4),
        1,
        (1, 3),
        &opts(Kernel::Nearest, Coords::HalfPixel),
    )
    .unwrap();
    check("nearest down", &got, &[1., 2., 4.], 0.0);
}
