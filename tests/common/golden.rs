//! Golden files (fixtures/golden): tensors written by a generator script with a reference
//! library, and in the metadata a `cases` list saying what each reference call was.

use std::path::Path;

use posgrid::checkpoint::Checkpoint;
use posgrid::resample::{Antialias, Coords, Edges, Kernel, Options};
use posgrid::values::{decode_f32, decode_f64};
use serde_json::Value;

/// An opened golden file and its cases.
pub struct Golden {
    pub path: &'static str,
    pub ckpt: Checkpoint,
    pub cases: Vec<Value>,
}

impl Golden {
    /// Open `path` (relative to the crate's root) and read its cases.
    pub fn open(path: &'static str) -> Self {
        let ckpt = Checkpoint::open(Path::new(env!("CARGO_MANIFEST_DIR")).join(path)).unwrap();
        let mut golden = Golden {
            path,
            ckpt,
            cases: Vec::new(),
        };
        golden.cases = golden.meta_json("cases").as_array().unwrap().clone();
        golden
    }

    /// A metadata value as it is stored.
    pub fn meta_text(&self, key: &str) -> String {
        let meta = self.ckpt.metadata().unwrap_or_default();
        let found = meta.iter().find(|(k, _)| k == key);
        found
            .unwrap_or_else(|| panic!("{key} missing from {}", self.path))
            .1
            .clone()
    }

    /// A metadata value read as JSON.
    pub fn meta_json(&self, key: &str) -> Value {
        serde_json::from_str(&self.meta_text(key)).unwrap()
    }

    /// A stored tensor's raw bytes and entry.
    pub fn raw(&self, name: &str) -> (Vec<u8>, posgrid::checkpoint::TensorEntry) {
        let t = self
            .ckpt
            .tensor(name)
            .unwrap_or_else(|| panic!("{name} missing from {}", self.path));
        (self.ckpt.read_bytes(t).unwrap(), t.clone())
    }

    /// A stored tensor's values (as f32) and shape.
    pub fn read(&self, name: &str) -> (Vec<f32>, Vec<usize>) {
        let (bytes, t) = self.raw(name);
        (decode_f32(t.dtype, &bytes).unwrap(), t.shape)
    }

    /// A stored tensor's values (as f64) and shape.
    pub fn read_f64(&self, name: &str) -> (Vec<f64>, Vec<usize>) {
        let (bytes, t) = self.raw(name);
        (decode_f64(t.dtype, &bytes).unwrap(), t.shape)
    }
}

/// The options a case's reference call was made with (the onnx Resize attributes, or the
/// framework's interpolate written in them), in posgrid's words. The framework's 'bilinear'
/// and 'trilinear' are the linear kernel on each axis, its 'bicubic' the cubic one.
pub fn case_options(case: &Value) -> Options {
    Options {
        kernel: match case["mode"].as_str().unwrap() {
            "linear" | "bilinear" | "trilinear" => Kernel::Bilinear,
            "cubic" | "bicubic" => Kernel::Bicubic,
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
    }
}
