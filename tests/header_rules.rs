//! One broken file per rule of the safetensors header (the rules of the format's published
//! specification: 8-byte little-endian length, UTF-8 JSON object, string metadata, known
//! dtypes, spans that tile the data area exactly). Each error names the file and the rule.

mod common;

use common::{crafted, raw};
use posgrid::checkpoint::Checkpoint;
use posgrid::error::{Error, FormatProblem, EXIT_INVALID_INPUT};

fn problem(path: &std::path::Path) -> (FormatProblem, String) {
    match Checkpoint::open(path) {
        Err(e @ Error::Invalid { .. }) => {
            assert_eq!(e.exit_code(), EXIT_INVALID_INPUT);
            let text = e.to_string();
            assert!(
                text.contains(&path.display().to_string()),
                "message names the file: {text}"
            );
            let Error::Invalid { problem, .. } = e else {
                unreachable!()
            };
            (problem, text)
        }
        other => panic!(
            "{}: expected an invalid-file error, got {other:?}",
            path.display()
        ),
    }
}

const F32_4: &str = r#""a":{"dtype":"F32","shape":[2,2],"data_offsets":[0,16]}"#;

#[test]
fn every_header_rule_has_a_failing_file() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let data16 = [0u8; 16];
    type Case = (
        &'static str,
        std::path::PathBuf,
        fn(&FormatProblem) -> bool,
        &'static str,
    );
    let cases: Vec<Case> = vec![
        (
            "empty file",
            raw(d, "empty", b""),
            |p| matches!(p, FormatProblem::TooShort { len: 0 }),
            "8-byte",
        ),
        (
            "too short",
            raw(d, "short", b"abc"),
            |p| matches!(p, FormatProblem::TooShort { .. }),
            "8-byte",
        ),
        (
            "length past the end",
            raw(d, "past", &[100, 0, 0, 0, 0, 0, 0, 0, b'{', b'}']),
            |p| matches!(p, FormatProblem::HeaderPastEnd { .. }),
            "truncated",
        ),
        (
            "absurd length",
            raw(d, "huge", &u64::MAX.to_le_bytes()),
            |p| matches!(p, FormatProblem::HeaderTooLarge { .. }),
            "limit",
        ),
        (
            "header of one byte",
            crafted(d, "tiny", "{", &[]),
            |p| matches!(p, FormatProblem::HeaderTooSmall),
            "too short",
        ),
        (
            "not UTF-8",
            raw(d, "utf", &[4, 0, 0, 0, 0, 0, 0, 0, b'{', 0xff, 0xfe, b'}']),
            |p| matches!(p, FormatProblem::HeaderNotUtf8 { .. }),
            "UTF-8",
        ),
        (
            "not JSON",
            crafted(d, "json", "{nope}", &[]),
            |p| matches!(p, FormatProblem::HeaderNotJson { .. }),
            "JSON",
        ),
        (
            "not an object",
            crafted(d, "array", "[1,2,3]", &[]),
            |p| matches!(p, FormatProblem::HeaderNotObject { .. }),
            "object",
        ),
        (
            "duplicate name",
            crafted(d, "dup", &format!("{{{F32_4},{F32_4}}}"), &data16),
            |p| matches!(p, FormatProblem::DuplicateKey { .. }),
            "twice",
        ),
        (
            "metadata not strings",
            crafted(
                d,
                "meta",
                &format!(r#"{{"__metadata__":{{"k":1}},{F32_4}}}"#),
                &data16,
            ),
            |p| matches!(p, FormatProblem::MetadataNotStrings { .. }),
            "strings",
        ),
        (
            "metadata not an object",
            crafted(
                d,
                "meta2",
                &format!(r#"{{"__metadata__":"x",{F32_4}}}"#),
                &data16,
            ),
            |p| matches!(p, FormatProblem::MetadataNotStrings { .. }),
            "strings",
        ),
        (
            "unknown dtype",
            crafted(
                d,
                "dtype",
                r#"{"a":{"dtype":"F33","shape":[4],"data_offsets":[0,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::UnknownDtype { .. }),
            "F33",
        ),
        (
            "negative dimension",
            crafted(
                d,
                "neg",
                r#"{"a":{"dtype":"F32","shape":[-4],"data_offsets":[0,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::BadDimension { .. }),
            "negative",
        ),
        (
            "fractional dimension",
            crafted(
                d,
                "frac",
                r#"{"a":{"dtype":"F32","shape":[1.5],"data_offsets":[0,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::BadDimension { .. }),
            "whole",
        ),
        (
            "overflowing shape",
            crafted(
                d,
                "ovf",
                r#"{"a":{"dtype":"F32","shape":[4294967296,4294967296,4],"data_offsets":[0,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::SizeOverflow { .. }),
            "overflows",
        ),
        (
            "missing field",
            crafted(
                d,
                "missing",
                r#"{"a":{"dtype":"F32","shape":[4]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::BadEntry { .. }),
            "data_offsets",
        ),
        (
            "size does not match span",
            crafted(
                d,
                "mismatch",
                r#"{"a":{"dtype":"F32","shape":[3],"data_offsets":[0,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::SpanMismatch { .. }),
            "12 bytes",
        ),
        (
            "span past the end",
            crafted(
                d,
                "spanend",
                r#"{"a":{"dtype":"F32","shape":[8],"data_offsets":[0,32]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::SpanPastEnd { .. }),
            "truncated",
        ),
        (
            "reversed span",
            crafted(
                d,
                "rev",
                r#"{"a":{"dtype":"F32","shape":[4],"data_offsets":[16,0]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::SpanReversed { .. }),
            "before",
        ),
        (
            "overlapping spans",
            crafted(
                d,
                "overlap",
                r#"{"a":{"dtype":"F32","shape":[4],"data_offsets":[0,16]},"b":{"dtype":"F32","shape":[2],"data_offsets":[8,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::SpansOverlap { .. }),
            "share",
        ),
        (
            "hole between spans",
            crafted(
                d,
                "hole",
                r#"{"a":{"dtype":"F32","shape":[1],"data_offsets":[0,4]},"b":{"dtype":"F32","shape":[2],"data_offsets":[8,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::Hole { .. }),
            "hole",
        ),
        (
            "hole at the start",
            crafted(
                d,
                "hole0",
                r#"{"b":{"dtype":"F32","shape":[2],"data_offsets":[8,16]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::Hole { after: None, .. }),
            "start",
        ),
        (
            "trailing bytes",
            crafted(
                d,
                "trail",
                r#"{"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]}}"#,
                &data16,
            ),
            |p| matches!(p, FormatProblem::TrailingBytes { .. }),
            "no tensor",
        ),
    ];
    for (what, path, is_expected, words) in cases {
        let (p, text) = problem(&path);
        assert!(is_expected(&p), "{what}: got {p:?}");
        assert!(
            text.contains(words),
            "{what}: message \"{text}\" should say \"{words}\""
        );
    }
}

#[test]
fn valid_edge_cases_are_accepted() {
    let dir = tempfile::tempdir().unwrap();
    // An empty header object, zero-size tensors, and padding spaces after the JSON.
    let empty = crafted(dir.path(), "empty-ok", "{}      ", &[]);
    assert!(Checkpoint::open(&empty).unwrap().tensors().is_empty());
    let zero = crafted(
        dir.path(),
        "zero",
        r#"{"z":{"dtype":"F32","shape":[0,4],"data_offsets":[0,0]},"a":{"dtype":"F32","shape":[2],"data_offsets":[0,8]}}"#,
        &[0u8; 8],
    );
    let ck = Checkpoint::open(&zero).unwrap();
    assert_eq!(ck.tensors().len(), 2);
    assert_eq!(ck.tensors()[0].name, "z", "header order kept");
}

#[test]
fn a_directory_or_missing_file_is_a_read_error() {
    let dir = tempfile::tempdir().unwrap();
    for p in [
        dir.path().to_path_buf(),
        dir.path().join("nope.safetensors"),
    ] {
        let e = Checkpoint::open(&p).unwrap_err();
        assert!(matches!(e, Error::Read { .. }), "{e:?}");
        assert_eq!(e.exit_code(), EXIT_INVALID_INPUT);
    }
}
