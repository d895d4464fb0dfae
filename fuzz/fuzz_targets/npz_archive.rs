//! Any bytes as an `.npz` file: opening it returns a value or an error, never a panic or a
//! hang; every array of an accepted archive is streamed through (a member's declared size
//! bounds the work, so members over a few MB are left out to keep runs fast).
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::{Source, TensorSource};

const LARGEST_READ: u64 = 8 << 20;

fn archive_path() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("posgrid-fuzz-npz-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        dir.join("input.npz")
    })
}

fuzz_target!(|data: &[u8]| {
    let path = archive_path();
    std::fs::write(path, data).unwrap();
    if let Ok(source) = Source::open(path) {
        for t in source.entries() {
            if t.byte_len() > LARGEST_READ {
                continue;
            }
            let mut seen = 0u64;
            // A broken member (bad CRC, short data) is an error, which is fine.
            let read = source.stream(t, &mut |chunk| {
                seen += chunk.len() as u64;
                Ok(())
            });
            if read.is_ok() {
                assert_eq!(seen, t.byte_len());
            }
        }
    }
});
