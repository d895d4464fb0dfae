//! Tensor-name helpers shared by the kinds.

/// Lower-case letters and digits only, so `pos_embed`, `posEmbed` and `pos-embed` compare equal.
pub fn normalized(name: &str) -> String {
    name.chars()
        .filter(|c| c.is_ascii_alphanumeric())
        .map(|c| c.to_ascii_lowercase())
        .collect()
}

/// The module path a tensor sits in: everything before its last `.` or `/`.
pub fn parent(name: &str) -> &str {
    name.rfind(['.', '/']).map_or("", |i| &name[..i])
}

/// Name with its first path component removed (`model_ema.pos_embed` → `pos_embed`).
pub fn without_first_component(name: &str) -> &str {
    name.find(['.', '/']).map_or(name, |i| &name[i + 1..])
}

pub fn common_prefix_len(a: &str, b: &str) -> usize {
    a.bytes().zip(b.bytes()).take_while(|(x, y)| x == y).count()
}

pub fn integer_sqrt(n: usize) -> Option<usize> {
    let r = (n as f64).sqrt().round() as usize;
    (r * r == n).then_some(r)
}
