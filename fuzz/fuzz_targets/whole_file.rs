//! Shared by the whole-file targets: write the fuzz input to a file with a given extension,
//! open it as posgrid opens any checkpoint, and stream every tensor of an accepted file (a
//! tensor's declared size bounds the work, so tensors over a few MB are left out to keep runs
//! fast). Opening returns a value or an error, never a panic or a hang.

use std::collections::HashMap;
use std::path::PathBuf;
use std::sync::Mutex;

use posgrid::checkpoint::{Source, TensorSource};

const LARGEST_READ: u64 = 8 << 20;

fn input_path(extension: &str) -> PathBuf {
    static PATHS: Mutex<Option<HashMap<String, PathBuf>>> = Mutex::new(None);
    let mut paths = PATHS.lock().unwrap();
    paths
        .get_or_insert_with(HashMap::new)
        .entry(extension.to_string())
        .or_insert_with(|| {
            let dir = std::env::temp_dir().join(format!(
                "posgrid-fuzz-{extension}-{}",
                std::process::id()
            ));
            std::fs::create_dir_all(&dir).unwrap();
            dir.join(format!("input.{extension}"))
        })
        .clone()
}

/// Open `data` as a file named `input.<extension>` and read every tensor; the opened source,
/// if the file was accepted.
pub fn open_and_read(data: &[u8], extension: &str) -> Option<Source> {
    let path = input_path(extension);
    std::fs::write(&path, data).unwrap();
    let source = Source::open(&path).ok()?;
    for t in source.entries() {
        if t.byte_len() > LARGEST_READ {
            continue;
        }
        let mut seen = 0u64;
        // A broken member or record (bad CRC, short data) is an error, which is fine.
        let read = source.stream(t, &mut |chunk| {
            seen += chunk.len() as u64;
            Ok(())
        });
        if read.is_ok() {
            assert_eq!(seen, t.byte_len());
        }
    }
    Some(source)
}
