//! Any bytes as a pickle: parse returns an arena or an error; an arena is named, written back,
//! and the written stream reads back to the same values.
#![no_main]

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::pickle::{parse, write, Limits};

fuzz_target!(|data: &[u8]| {
    if let Ok(p) = parse(data, &Limits::for_len(data.len())) {
        let _ = p.tensors();
        let out = write(&p);
        let again = parse(&out, &Limits::for_len(out.len())).expect("written pickle reads back");
        assert!(p.equivalent(&again), "written pickle reads back to other values");
    }
});
