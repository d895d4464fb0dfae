//! Any bytes as a PyTorch `.pth` file: opening it (ZIP records, data.pkl, every tensor's view)
//! returns a value or an error, never a panic or a hang; every tensor of an accepted file is
//! streamed through, and discovery runs over it.
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::{Source, TensorSource};
use posgrid::discover::{self, Hints};

const LARGEST_READ: u64 = 8 << 20;

fn file_path() -> &'static PathBuf {
    static PATH: OnceLock<PathBuf> = OnceLock::new();
    PATH.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("posgrid-fuzz-pth-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        dir.join("input.pth")
    })
}

fuzz_target!(|data: &[u8]| {
    let path = file_path();
    std::fs::write(path, data).unwrap();
    if let Ok(source) = Source::open(path) {
        for t in source.entries() {
            if t.byte_len() > LARGEST_READ {
                continue;
            }
            let mut seen = 0u64;
            // A damaged record (bad CRC) is an error, which is fine.
            let read = source.stream(t, &mut |chunk| {
                seen += chunk.len() as u64;
                Ok(())
            });
            if read.is_ok() {
                assert_eq!(seen, t.byte_len());
            }
        }
        let _ = discover::discover(&source, &Hints::default());
    }
});
