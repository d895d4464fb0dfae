//! Random byte flips and truncations of valid files (written by the reference serializer):
//! the reader and discovery return a value or an error and never panic; through the binary,
//! every outcome is a documented exit code with no output file left unless it succeeded.

mod common;

use std::process::Command;

use common::*;
use posgrid::checkpoint::InMemory;
use posgrid::kinds::{discover, Hints};
use proptest::prelude::*;
use safetensors::Dtype;

fn valid_file() -> Vec<u8> {
    let dir = tempfile::tempdir().unwrap();
    let p = write(
        dir.path(),
        "v.safetensors",
        &[
            floats(
                "vision_model.embeddings.position_embedding.weight",
                Dtype::BF16,
                &[17, 8],
                &smooth_table(1, 4, 4, 8, 1),
            ),
            ids("vision_model.embeddings.position_ids", &[1, 17]),
            floats(
                "vision_model.embeddings.patch_embedding.weight",
                Dtype::F32,
                &[8, 3, 2, 2],
                &noise(96, 2, 0.1),
            ),
            floats(
                "decoder_pos_embed",
                Dtype::F32,
                &[1, 17, 8],
                &sincos_table(1, 4, 4, 8),
            ),
        ],
        Some(&[("format", "pt")]),
    );
    std::fs::read(p).unwrap()
}

fn mutate(mut bytes: Vec<u8>, flips: &[(usize, u8)], cut: Option<usize>) -> Vec<u8> {
    for &(at, v) in flips {
        let i = at % bytes.len();
        bytes[i] ^= v.max(1);
    }
    if let Some(c) = cut {
        bytes.truncate(c % (bytes.len() + 1));
    }
    bytes
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2000))]

    #[test]
    fn reader_and_discovery_never_panic(flips in prop::collection::vec((any::<usize>(), any::<u8>()), 0..8),
                                        cut in prop::option::of(any::<usize>())) {
        let bytes = mutate(valid_file_cached().to_vec(), &flips, cut);
        if let Ok(source) = InMemory::parse(&bytes) {
            let _ = discover(&source, &Hints::default());
        }
    }
}

fn valid_file_cached() -> &'static [u8] {
    static FILE: std::sync::OnceLock<Vec<u8>> = std::sync::OnceLock::new();
    FILE.get_or_init(valid_file)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(40))]

    #[test]
    fn the_binary_answers_every_mutant_with_a_documented_code(flips in prop::collection::vec((any::<usize>(), any::<u8>()), 1..6),
                                                              cut in prop::option::of(any::<usize>())) {
        let dir = tempfile::tempdir().unwrap();
        let input = dir.path().join("m.safetensors");
        let bytes = mutate(valid_file_cached().to_vec(), &flips, cut);
        std::fs::write(&input, &bytes).unwrap();
        let out = dir.path().join("o.safetensors");
        let o = Command::new(env!("CARGO_BIN_EXE_posgrid"))
            .args(["resize", input.to_str().unwrap(), "-o", out.to_str().unwrap(), "--grid", "6"])
            .output()
            .unwrap();
        let code = o.status.code().unwrap_or(-1);
        prop_assert!([0, 3, 4, 6].contains(&code), "exit {code}: {}", String::from_utf8_lossy(&o.stderr));
        prop_assert_eq!(out.exists(), code == 0);
        prop_assert_eq!(std::fs::read(&input).unwrap(), bytes, "input unchanged");
        let left: Vec<_> = std::fs::read_dir(dir.path()).unwrap().collect();
        prop_assert_eq!(left.len(), if code == 0 { 2 } else { 1 }, "no temporary file left");
    }
}
