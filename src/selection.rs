//! Which tensors of a tree-shaped checkpoint (a PyTorch file: `model/...`, `model_ema/...`,
//! `optimizer/...`, `epoch`) go into a flat output, and under which names. A flat container
//! (safetensors, npz) — or a PyTorch output asked to hold only the model — receives one state
//! dict: the one named by `--state-dict`, else the one dict that holds the position tables.
//! Its tensors keep their names inside it, less an optional prefix (`--strip-prefix module.`);
//! everything else is dropped and listed.

use crate::checkpoint::pickle::unescape_key;
use crate::checkpoint::{Format, Source, TensorSource};
use crate::error::{Error, Result};

/// How the output is named and filtered.
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Selection {
    /// The state dict written (its key path; empty for the root), or `None` to keep the
    /// whole tree.
    pub dict: Option<String>,
    /// A prefix removed from every written name.
    pub strip: Option<String>,
}

/// What the user asked for.
#[derive(Debug, Clone, Default)]
pub struct SelectionRequest {
    /// `--state-dict PATH`.
    pub state_dict: Option<String>,
    /// `--strip-prefix TEXT`.
    pub strip_prefix: Option<String>,
    /// `--model-only`: a PyTorch output holds only the state dict.
    pub model_only: bool,
}

/// The dict a tensor name lies in: everything before its last `/` (empty at the root).
pub fn parent(name: &str) -> &str {
    name.rfind('/').map_or("", |i| &name[..i])
}

/// The name a tensor gets in the output, or `None` when it is not written. A name inside the
/// chosen dict is its key as it is (the `%2F`/`%25` escapes of the path are undone).
pub fn out_name(name: &str, sel: &Selection) -> Option<String> {
    let inside = match sel.dict.as_deref() {
        None => name.to_string(),
        Some("") => unescape_key((!name.contains('/')).then_some(name)?),
        Some(dict) => unescape_key(
            name.strip_prefix(dict)
                .and_then(|rest| rest.strip_prefix('/'))
                .filter(|rest| !rest.contains('/'))?,
        ),
    };
    Some(match sel.strip.as_deref() {
        Some(p) => inside.strip_prefix(p).unwrap_or(&inside).to_string(),
        None => inside,
    })
}

/// Decide the selection for writing `source` as `format`; `tables` are the names of the
/// position tables discovery found.
pub fn choose(
    source: &Source,
    format: Format,
    tables: &[&str],
    req: &SelectionRequest,
) -> Result<Selection> {
    // Only a PyTorch file is a tree: npz names use `/` too, but as plain text.
    let torch = source.format() == Format::PyTorch;
    let flat = format != Format::PyTorch || req.model_only;
    let strip = req.strip_prefix.clone();
    if req.state_dict.is_some() && !(torch && flat) {
        return Err(Error::Usage(
            "--state-dict chooses the state dict of a PyTorch input that a flat output (.safetensors, .npz) or --model-only holds".into(),
        ));
    }
    if torch && !flat && strip.is_some() {
        return Err(Error::Usage(
            "--strip-prefix renames the tensors of one state dict: with a PyTorch output, add --model-only (the whole tree is otherwise kept as it is)".into(),
        ));
    }
    if !torch || !flat {
        return Ok(Selection { dict: None, strip });
    }
    let tree = source.entries().iter().any(|t| t.name.contains('/'));
    let dict = match &req.state_dict {
        Some(asked) => {
            let asked = asked.trim_end_matches('/').to_string();
            let holds = source.entries().iter().any(|t| parent(&t.name) == asked);
            if !holds {
                return Err(Error::table(
                    source.source_path(),
                    format!("--state-dict {asked}: no tensors lie directly in a dict of that path"),
                ));
            }
            asked
        }
        None if !tree => String::new(),
        None => only_dict(source, tables)?,
    };
    Ok(Selection {
        dict: Some(dict),
        strip,
    })
}

/// The one dict holding the position tables.
fn only_dict(source: &Source, tables: &[&str]) -> Result<String> {
    let mut dicts: Vec<&str> = tables.iter().map(|t| parent(t)).collect();
    dicts.sort();
    dicts.dedup();
    match dicts.as_slice() {
        [one] => Ok(one.to_string()),
        [] => Err(Error::table(
            source.source_path(),
            "no position table tells which state dict to write; pass --state-dict PATH",
        )),
        many => Err(Error::table(
            source.source_path(),
            format!(
                "position tables lie in several state dicts ({}); a flat output holds one: pass --state-dict with one of them",
                many.iter()
                    .map(|d| if d.is_empty() { "<root>" } else { d })
                    .collect::<Vec<_>>()
                    .join(", ")
            ),
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_inside_the_chosen_dict_are_kept_less_the_prefix() {
        let sel = Selection {
            dict: Some("model".into()),
            strip: Some("module.".into()),
        };
        assert_eq!(
            out_name("model/module.pos_embed", &sel).as_deref(),
            Some("pos_embed")
        );
        assert_eq!(
            out_name("model/cls_token", &sel).as_deref(),
            Some("cls_token")
        );
        assert_eq!(out_name("model_ema/pos_embed", &sel), None);
        assert_eq!(out_name("model/inner/x", &sel), None);
        let root = Selection {
            dict: Some(String::new()),
            strip: None,
        };
        assert_eq!(out_name("pos_embed", &root).as_deref(), Some("pos_embed"));
        assert_eq!(out_name("optimizer/state/0/exp_avg", &root), None);
        // Escaped keys come out as they are: a `/` and a `%` inside a key.
        assert_eq!(out_name("a%2Fb", &root).as_deref(), Some("a/b"));
        assert_eq!(out_name("100%25", &root).as_deref(), Some("100%"));
        let all = Selection::default();
        assert_eq!(out_name("a/b/c", &all).as_deref(), Some("a/b/c"));
    }
}
