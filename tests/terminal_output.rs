//! What reaches a terminal: names from a hostile checkpoint cannot carry escape sequences,
//! bidirectional overrides or line breaks to the screen (scan, the resize summary, warnings,
//! error messages), while `--json` stays exact; warnings go to stderr, results to stdout; a
//! `--tensor` name the file does not hold fails every command alike.

mod common;

use std::path::Path;

use common::*;
use safetensors::Dtype;

/// Names that would set the window title, clear the screen, reverse the text direction and
/// print a fake line of their own if printed raw.
const TITLE: &str = "pos_embed\x1b]0;owned\x07";
const CLEAR: &str = "cls_token\x1b[2J\x1b[H";
const BIDI: &str = "head.weight\u{202e}txt.exe";
const FAKE_LINE: &str = "ln.weight\nverified: all tensors signed";

fn hostile(dir: &Path) -> std::path::PathBuf {
    let d = 8;
    write(
        dir,
        "hostile.safetensors",
        &[
            floats(TITLE, Dtype::F32, &[1, 17, d], &smooth_table(1, 4, 4, d, 1)),
            floats(CLEAR, Dtype::F32, &[1, 1, d], &noise(d, 2, 0.1)),
            floats(BIDI, Dtype::F32, &[2, d], &noise(2 * d, 3, 0.1)),
            floats(FAKE_LINE, Dtype::F32, &[d], &noise(d, 4, 0.1)),
            // 12 rows fit 3 slots + 3x3 and 8 slots + 2x2: ambiguous, named in a warning.
            floats(
                "decoder_pos_embed\x1b[31m",
                Dtype::F32,
                &[1, 12, 2],
                &noise(24, 5, 0.1),
            ),
        ],
        None,
    )
}

/// No ESC, C1 control, BEL, bidirectional control or foreign line in the text.
fn assert_inert(what: &str, bytes: &[u8]) {
    let text = String::from_utf8_lossy(bytes);
    for c in text.chars() {
        let bad = (c.is_control() && c != '\n')
            || ('\u{202a}'..='\u{202e}').contains(&c)
            || ('\u{2066}'..='\u{2069}').contains(&c);
        assert!(!bad, "{what} carries {c:?}:\n{text}");
    }
    assert!(
        !text.lines().any(|l| l.starts_with("verified")),
        "{what} carries a line from the file:\n{text}"
    );
}

#[test]
fn scan_text_escapes_names_from_the_file() {
    let dir = tempfile::tempdir().unwrap();
    let input = hostile(dir.path());
    let o = posgrid(&["scan", s(&input), "--slots", "1"]);
    assert_inert("scan stdout", &o.stdout);
    assert_inert("scan stderr", &o.stderr);
    let out = String::from_utf8_lossy(&o.stdout);
    assert!(out.contains("pos_embed\\x1b]0;owned\\x07"), "{out}");
}

#[test]
fn scan_json_stays_exact() {
    let dir = tempfile::tempdir().unwrap();
    let input = hostile(dir.path());
    let o = posgrid(&["scan", s(&input), "--json", "--slots", "1"]);
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(v["tables"][0]["name"], TITLE);
    // serde_json writes control characters as \u escapes: nothing raw on the terminal.
    assert!(!o.stdout.contains(&0x1b));
}

#[test]
fn resize_summary_and_warnings_escape_names() {
    let dir = tempfile::tempdir().unwrap();
    let input = hostile(dir.path());
    let out = dir.path().join("out.safetensors");
    let o = posgrid(&[
        "resize",
        s(&input),
        "-o",
        s(&out),
        "--grid",
        "6",
        "--tensor",
        TITLE,
        "--slots",
        "1",
    ]);
    assert_eq!(o.status.code(), Some(0), "{o:?}");
    assert_inert("resize stdout", &o.stdout);
    assert_inert("resize stderr", &o.stderr);
}

#[test]
fn error_messages_escape_names() {
    let dir = tempfile::tempdir().unwrap();
    // A header rule broken by a tensor whose name carries escapes: the error quotes the name.
    let header = "{\"evil\\u001b[2J\\u001b]0;x\\u0007\":{\"dtype\":\"F32\",\"shape\":[2],\"data_offsets\":[0,4]}}";
    let input = crafted(dir.path(), "bad.safetensors", header, &[0u8; 4]);
    let o = posgrid(&["scan", s(&input)]);
    assert_eq!(o.status.code(), Some(3));
    assert_inert("error", &o.stderr);
    assert!(String::from_utf8_lossy(&o.stderr).contains("evil\\x1b[2J"));
}

#[test]
fn warnings_go_to_stderr_and_stdout_holds_the_result() {
    let dir = tempfile::tempdir().unwrap();
    let input = hostile(dir.path());
    let o = posgrid(&["scan", s(&input)]);
    let out = String::from_utf8_lossy(&o.stdout);
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(!out.contains("warning"), "{out}");
    assert!(
        err.contains("posgrid: warning: decoder_pos_embed\\x1b[31m"),
        "{o:?}"
    );
    assert_inert("warnings", &o.stderr);
}

#[test]
fn a_missing_tensor_name_fails_scan_like_resize_and_map() {
    let dir = tempfile::tempdir().unwrap();
    let input = hostile(dir.path());
    let png = dir.path().join("m.png");
    let out = dir.path().join("o.safetensors");
    for args in [
        vec!["scan", s(&input), "--tensor", "nosuch"],
        vec![
            "resize",
            s(&input),
            "-o",
            s(&out),
            "--grid",
            "6",
            "--tensor",
            "nosuch",
        ],
        vec!["map", s(&input), "-o", s(&png), "--tensor", "nosuch"],
    ] {
        let o = posgrid(&args);
        assert_eq!(o.status.code(), Some(4), "{args:?}: {o:?}");
        assert!(String::from_utf8_lossy(&o.stderr).contains("nosuch"));
    }
}
