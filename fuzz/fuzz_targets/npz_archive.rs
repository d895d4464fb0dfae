//! Any bytes as an `.npz` file: opening it returns a value or an error, never a panic or a
//! hang; every array of an accepted archive is streamed through.
#![no_main]

#[path = "whole_file.rs"]
mod whole_file;

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    whole_file::open_and_read(data, "npz");
});
