//! Text from a checkpoint made safe for a terminal. Tensor names, metadata and file names come
//! from files that may be hostile: a raw ESC can retitle the window, clear the screen or draw
//! fake lines, and bidirectional overrides can make a name read differently from its bytes.
//! Every line posgrid prints for people passes through [`visible`]; the JSON output needs no
//! such step (serde_json escapes control characters) and stays exact.

use std::borrow::Cow;

/// Whether a character must not reach a terminal as it is: C0 and C1 controls, DEL, the
/// bidirectional embeddings, overrides, isolates and marks, and the Unicode line and paragraph
/// separators (which some terminals treat as line breaks).
fn is_unsafe(c: char) -> bool {
    c.is_control()
        || matches!(
            c,
            '\u{061c}'
                | '\u{200e}'
                | '\u{200f}'
                | '\u{202a}'..='\u{202e}'
                | '\u{2066}'..='\u{2069}'
                | '\u{2028}'
                | '\u{2029}'
        )
}

/// `s` with every unsafe character written as a visible escape (`\x1b`, `\n`, `\u{202e}`) and
/// backslashes doubled, so an escaped character cannot be mistaken for text that reads the same.
pub fn visible(s: &str) -> Cow<'_, str> {
    if !s.chars().any(|c| is_unsafe(c) || c == '\\') {
        return Cow::Borrowed(s);
    }
    let mut out = String::with_capacity(s.len() + 8);
    for c in s.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c if is_unsafe(c) && (c as u32) < 0x100 => {
                out.push_str(&format!("\\x{:02x}", c as u32));
            }
            c if is_unsafe(c) => out.push_str(&format!("\\u{{{:04x}}}", c as u32)),
            c => out.push(c),
        }
    }
    Cow::Owned(out)
}

/// Append one line of text to `out`, made visible, and a newline.
pub fn push_line(out: &mut String, line: impl AsRef<str>) {
    out.push_str(&visible(line.as_ref()));
    out.push('\n');
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plain_text_is_borrowed_unchanged() {
        let s = "blocks.0.attn.pos_embed (Größe 14×14)";
        assert!(matches!(visible(s), Cow::Borrowed(t) if t == s));
    }

    #[test]
    fn controls_and_bidi_overrides_are_escaped() {
        assert_eq!(visible("a\x1b]0;x\x07b"), "a\\x1b]0;x\\x07b");
        assert_eq!(visible("a\nb\r\t"), "a\\nb\\r\\t");
        assert_eq!(visible("\u{9b}2J"), "\\x9b2J");
        assert_eq!(visible("abc\u{202e}fdp.exe"), "abc\\u{202e}fdp.exe");
        assert_eq!(visible("x\u{2066}y\u{7f}"), "x\\u{2066}y\\x7f");
        assert_eq!(visible("a\\x1b"), "a\\\\x1b");
    }
}
