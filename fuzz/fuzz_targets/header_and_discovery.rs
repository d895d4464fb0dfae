//! Any bytes: the header parser must return a value or an error, never panic or hang; a file
//! it accepts goes through discovery with its own bytes as the data.
#![no_main]

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::safetensors::parse_bytes;
use posgrid::checkpoint::{TensorEntry, TensorSource};
use posgrid::discover::{discover, Hints};

struct InMemory<'a> {
    bytes: &'a [u8],
    entries: Vec<TensorEntry>,
}

impl TensorSource for InMemory<'_> {
    fn entries(&self) -> &[TensorEntry] {
        &self.entries
    }
    fn bytes(&self, t: &TensorEntry) -> posgrid::Result<Vec<u8>> {
        Ok(self.bytes[t.begin as usize..t.end as usize].to_vec())
    }
}

fuzz_target!(|data: &[u8]| {
    if let Ok(header) = parse_bytes(data) {
        for t in &header.tensors {
            assert!(t.begin <= t.end && t.end as usize <= data.len());
        }
        let source = InMemory { bytes: data, entries: header.tensors };
        let _ = discover(&source, &Hints::default());
    }
});
