//! Evidence for class slots from the token tensors beside a table: a class token and a
//! distillation token each have a position row in front of the grid (common practice);
//! register tokens usually have none; some models fold the class token's row away (their
//! table has no class row beside a class token). Row arithmetic and tokens together decide;
//! when they disagree the table is ambiguous, never guessed.

use super::SlotsFrom;
use crate::checkpoint::TensorEntry;
use crate::kinds::names::{normalized, parent};

/// The token tensors of a table's model.
#[derive(Debug, Default)]
pub(super) struct Tokens {
    /// Class and distillation tokens: each expects a position row.
    pub with_rows: Vec<(String, usize)>,
    /// Register tokens: no position rows.
    pub registers: Vec<(String, usize)>,
}

impl Tokens {
    fn count(&self) -> usize {
        self.with_rows.iter().map(|t| t.1).sum()
    }

    fn names(list: &[(String, usize)]) -> String {
        list.iter()
            .map(|t| t.0.as_str())
            .collect::<Vec<_>>()
            .join(", ")
    }
}

/// What a token tensor's name says it is (names in released checkpoints, common practice).
enum Role {
    Class,
    Distillation,
    Register,
}

fn role(name: &str) -> Option<Role> {
    let n = normalized(name);
    let last = n.rsplit('.').next().unwrap_or(&n);
    if ["clstoken", "classtoken", "classembedding", "clsembedding"]
        .iter()
        .any(|k| last.ends_with(k))
    {
        Some(Role::Class)
    } else if ["disttoken", "distillationtoken"]
        .iter()
        .any(|k| last.ends_with(k))
    {
        Some(Role::Distillation)
    } else if ["regtoken", "registertoken", "registertokens", "registers"]
        .iter()
        .any(|k| last.ends_with(k))
    {
        Some(Role::Register)
    } else {
        None
    }
}

/// How many tokens a tensor holds: `[D]`, `[1, D]`, `[1, 1, D]` hold one, `[1, n, D]` n.
fn token_count(entry: &TensorEntry, dim: usize) -> Option<usize> {
    match entry.shape[..] {
        [d] | [1, d] | [1, 1, d] if d == dim => Some(1),
        [1, n, d] if d == dim && n >= 1 => Some(n),
        _ => None,
    }
}

/// The token tensors of the table's model: same width, in the table's module or one that
/// contains it.
pub(super) fn beside(entries: &[TensorEntry], table: &str, dim: usize) -> Tokens {
    let home = parent(table);
    let mut found = Tokens::default();
    for e in entries {
        let Some(role) = role(&e.name) else { continue };
        let module = parent(&e.name);
        let contains = home == module
            || module.is_empty()
            || (home.starts_with(module)
                && matches!(home.as_bytes().get(module.len()), Some(b'.' | b'/')));
        let Some(n) = token_count(e, dim).filter(|_| contains) else {
            continue;
        };
        match role {
            Role::Class | Role::Distillation => found.with_rows.push((e.name.clone(), n)),
            Role::Register => found.registers.push((e.name.clone(), n)),
        }
    }
    found
}

/// The verdict of tokens and rows together.
pub(super) enum Decision {
    /// No token evidence: the row count decides as before.
    Rows,
    /// One explanation, what decided it, and a note saying so.
    Take((usize, (usize, usize)), SlotsFrom, String),
    /// The rows fit no slot count the tokens allow: why, for the ambiguity message.
    Disagree(String),
}

/// Decide among the row count's explanations `(slots, grid)` with the tokens.
pub(super) fn decide(by_rows: &[(usize, (usize, usize))], tokens: &Tokens) -> Decision {
    let expected = tokens.count();
    if tokens.with_rows.is_empty() || by_rows.is_empty() {
        return Decision::Rows;
    }
    let registers = if tokens.registers.is_empty() {
        String::new()
    } else {
        format!(
            "; register tokens ({}) have no position rows",
            Tokens::names(&tokens.registers)
        )
    };
    if let Some(&c) = by_rows.iter().find(|c| c.0 == expected) {
        return Decision::Take(
            c,
            SlotsFrom::Tokens,
            format!(
                "{expected} slot(s) from the tokens ({}) and the rows{registers}",
                Tokens::names(&tokens.with_rows)
            ),
        );
    }
    if let Some(&c) = by_rows.iter().find(|c| c.0 == 0) {
        return Decision::Take(
            c,
            SlotsFrom::Rows,
            format!(
                "no class row: the rows fit a grid alone, so the token(s) {} have no position row (folded away){registers}",
                Tokens::names(&tokens.with_rows)
            ),
        );
    }
    Decision::Disagree(format!(
        "the tokens {} expect {expected} slot(s), which the rows do not fit",
        Tokens::names(&tokens.with_rows)
    ))
}
