//! Any bytes as the start of a `.npy` member: the header parser returns a value or an error.
#![no_main]

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::npz::{dtype_from_descr, parse_npy_header};

fuzz_target!(|data: &[u8]| {
    if let Ok(h) = parse_npy_header(data) {
        assert!(h.data_offset <= data.len());
        let _ = dtype_from_descr(&h.descr);
    }
});
