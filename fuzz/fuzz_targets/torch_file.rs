//! Any bytes as a PyTorch `.pth` file: opening it (ZIP records, data.pkl, every tensor's view)
//! returns a value or an error, never a panic or a hang; every tensor of an accepted file is
//! streamed through, and discovery runs over it.
#![no_main]

#[path = "whole_file.rs"]
mod whole_file;

use libfuzzer_sys::fuzz_target;
use posgrid::kinds::{self, Hints};

fuzz_target!(|data: &[u8]| {
    if let Some(source) = whole_file::open_and_read(data, "pth") {
        let _ = discover::discover(&source, &Hints::default());
    }
});
