//! Any bytes: the header parser must return a value or an error, never panic or hang; a file
//! it accepts goes through discovery with its own bytes as the data.
#![no_main]

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::InMemory;
use posgrid::kinds::{discover, Hints};

fuzz_target!(|data: &[u8]| {
    if let Ok(source) = InMemory::parse(data) {
        for t in &source.entries {
            assert!(t.begin <= t.end && t.end as usize <= data.len());
        }
        let _ = discover(&source, &Hints::default());
    }
});
