//! Interpolation kernels as plain functions of the distance (in source samples) with their
//! support radius. The weight tables stretch them for antialiasing; nothing here knows axes.

/// Linear ("tent") kernel, support 1.
pub fn triangle(x: f64) -> f64 {
    let x = x.abs();
    if x < 1.0 {
        1.0 - x
    } else {
        0.0
    }
}

/// Keys' cubic convolution kernel with parameter `a`, support 2 (ONNX Resize `cubic_coeff_a`).
pub fn cubic(x: f64, a: f64) -> f64 {
    let x = x.abs();
    if x <= 1.0 {
        ((a + 2.0) * x - (a + 3.0)) * x * x + 1.0
    } else if x < 2.0 {
        ((a * x - 5.0 * a) * x + 8.0 * a) * x - 4.0 * a
    } else {
        0.0
    }
}

fn sinc(x: f64) -> f64 {
    if x == 0.0 {
        1.0
    } else {
        let px = std::f64::consts::PI * x;
        px.sin() / px
    }
}

/// Lanczos windowed sinc with three lobes, support 3.
pub fn lanczos3(x: f64) -> f64 {
    if x.abs() < 3.0 {
        sinc(x) * sinc(x / 3.0)
    } else {
        0.0
    }
}
