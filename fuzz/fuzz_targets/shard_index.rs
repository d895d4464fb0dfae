//! Any bytes as a shard index beside two valid shards: opening the set returns a value or an
//! error, never a panic or a hang; an accepted set has every tensor read back.
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;
use posgrid::checkpoint::safetensors::encode_header;
use posgrid::checkpoint::{Dtype, Source, TensorSource};

/// A directory of this process holding `a.safetensors` and `b.safetensors`.
fn set_dir() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let dir = std::env::temp_dir().join(format!("posgrid-fuzz-index-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let shard = |name: &str, tensor: &str, shape: Vec<usize>| {
            let len = shape.iter().product::<usize>() as u64 * 4;
            let mut bytes = encode_header(&[(tensor.into(), Dtype::F32, shape, 0, len)], None, 0);
            bytes.extend((0..len / 4).flat_map(|i| (i as f32 * 0.01).to_le_bytes()));
            std::fs::write(dir.join(name), bytes).unwrap();
        };
        shard("a.safetensors", "pos_embed", vec![1, 17, 8]);
        shard("b.safetensors", "cls_token", vec![1, 1, 8]);
        dir
    })
}

fuzz_target!(|data: &[u8]| {
    let index = set_dir().join("model.safetensors.index.json");
    std::fs::write(&index, data).unwrap();
    if let Ok(source) = Source::open(&index) {
        for t in source.entries() {
            let bytes = source.bytes(t).expect("an accepted set reads back");
            assert_eq!(bytes.len() as u64, t.byte_len());
        }
    }
});
