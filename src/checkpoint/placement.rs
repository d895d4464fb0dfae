//! Where the pieces of a rewritten data area go, so that the kernel can share the blocks of the
//! untouched ones with the source. A run of untouched bytes can be cloned only if it sits at
//! the same offset modulo the block size in the output as in the source; a container whose
//! data area starts after a header of free length (safetensors pads its header with spaces)
//! can shift the whole area by choosing that length, but every resized table between two runs
//! shifts the runs after it by the change of its size. So new pieces are kept where they are
//! or moved to the end, whichever lets more untouched bytes keep their offset modulo the
//! block, and the data area then starts where the best-served runs need it.

use std::collections::HashMap;

use crate::write::share::whole_block_bytes;

/// One piece of an output's data area, in the source's data order.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Piece {
    /// Bytes copied from a source file, where they start at offset `at`.
    Kept { at: u64, len: u64 },
    /// Bytes written anew (a resized table), which may go anywhere.
    New { len: u64 },
}

impl Piece {
    fn len(&self) -> u64 {
        match *self {
            Piece::Kept { len, .. } | Piece::New { len } => len,
        }
    }
}

/// The chosen layout of a data area.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Placement {
    /// Piece indices in the order they are written.
    pub order: Vec<usize>,
    /// What the data area's start offset should be modulo the block size, when some kept
    /// piece holds whole blocks that can be shared.
    pub start_residue: Option<u64>,
    /// Bytes of whole blocks that keep their offset modulo the block size.
    pub shareable: u64,
}

/// Lay the pieces out for the most shareable bytes: each new piece stays in place or moves
/// to the end (greedily, from both extremes; ties keep the source order).
pub fn place(pieces: &[Piece], block: u64) -> Placement {
    let news: Vec<usize> = (0..pieces.len())
        .filter(|&i| matches!(pieces[i], Piece::New { .. }))
        .collect();
    let mut best = improve(pieces, block, &news, vec![false; news.len()]);
    let from_all_moved = improve(pieces, block, &news, vec![true; news.len()]);
    if from_all_moved.shareable > best.shareable {
        best = from_all_moved;
    }
    best
}

/// Beyond this many new pieces only the two extremes are weighed (all in place, all at the
/// end): the greedy pass costs a layout per piece, and a hostile file may hold thousands.
const GREEDY_LIMIT: usize = 64;

/// One greedy pass from `moved`: each new piece's place is flipped when that shares more.
fn improve(pieces: &[Piece], block: u64, news: &[usize], mut moved: Vec<bool>) -> Placement {
    let mut best = evaluate(pieces, block, news, &moved);
    if news.len() > GREEDY_LIMIT {
        return best;
    }
    for i in 0..news.len() {
        moved[i] = !moved[i];
        let tried = evaluate(pieces, block, news, &moved);
        if tried.shareable > best.shareable {
            best = tried;
        } else {
            moved[i] = !moved[i];
        }
    }
    best
}

/// The placement with the new pieces flagged in `moved` at the end, in their source order.
fn evaluate(pieces: &[Piece], block: u64, news: &[usize], moved: &[bool]) -> Placement {
    let at_end: Vec<usize> = news
        .iter()
        .zip(moved)
        .filter(|(_, &m)| m)
        .map(|(&i, _)| i)
        .collect();
    let mut is_at_end = vec![false; pieces.len()];
    for &i in &at_end {
        is_at_end[i] = true;
    }
    let order: Vec<usize> = (0..pieces.len())
        .filter(|&i| !is_at_end[i])
        .chain(at_end.iter().copied())
        .collect();
    // Per residue of the data area's start: the whole-block bytes it lets keep their offset.
    let mut gain: HashMap<u64, u64> = HashMap::new();
    let mut first_seen: Vec<u64> = Vec::new();
    let mut offset = 0u64;
    for &i in &order {
        if let Piece::Kept { at, len } = pieces[i] {
            let weight = whole_block_bytes(at, len, block);
            if weight > 0 {
                let residue = (at % block + block - offset % block) % block;
                if !gain.contains_key(&residue) {
                    first_seen.push(residue);
                }
                *gain.entry(residue).or_default() += weight;
            }
        }
        offset += pieces[i].len();
    }
    // The best residue; ties go to the one the earliest run needs.
    let best = first_seen
        .iter()
        .copied()
        .fold(None::<(u64, u64)>, |acc, r| match acc {
            Some((_, g)) if g >= gain[&r] => acc,
            _ => Some((r, gain[&r])),
        });
    Placement {
        order,
        start_residue: best.map(|(r, _)| r),
        shareable: best.map_or(0, |(_, g)| g),
    }
}

/// The data area's start: the smallest offset from `min_start` on with the wanted residue
/// modulo `block`, or, with none wanted, `min_start` rounded up to a multiple of 8 (the
/// alignment safetensors writers keep).
pub fn start_offset(min_start: u64, residue: Option<u64>, block: u64) -> u64 {
    match residue {
        Some(r) => min_start + (r + block - min_start % block) % block,
        None => min_start.div_ceil(8) * 8,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const B: u64 = 4096;

    #[test]
    fn a_table_that_keeps_its_size_modulo_the_block_stays_in_place() {
        // [A][T][C] where T grows by a whole number of blocks: both runs keep their offsets.
        // The source: A at 1000..3B, T (one block) at 3B..4B, C from 4B.
        let pieces = [
            Piece::Kept {
                at: 1000,
                len: 3 * B - 1000,
            },
            Piece::New { len: 3 * B },
            Piece::Kept {
                at: 4 * B,
                len: 100 * B,
            },
        ];
        let p = place(&pieces, B);
        assert_eq!(p.order, [0, 1, 2]);
        assert_eq!(p.start_residue, Some(1000));
        assert_eq!(p.shareable, 2 * B + 100 * B);
    }

    #[test]
    fn the_larger_run_is_served_when_a_table_shifts_the_rest() {
        // T was 10 bytes and becomes 20: no order keeps both runs; the big one wins.
        let small = Piece::Kept { at: 0, len: 2 * B };
        let t = Piece::New { len: 20 };
        let big = Piece::Kept {
            at: 2 * B + 10,
            len: 50 * B,
        };
        let p = place(&[small, t, big], B);
        assert_eq!(p.shareable, 49 * B, "the big run's whole blocks");
        let offset_of_big: u64 = p
            .order
            .iter()
            .take_while(|&&i| i != 2)
            .map(|&i| [small, t, big][i].len())
            .sum();
        let start = start_offset(100, p.start_residue, B);
        assert_eq!((start + offset_of_big) % B, (2 * B + 10) % B);
    }

    #[test]
    fn moving_tables_to_the_end_reunites_runs_they_separated_by_whole_blocks() {
        // Two old tables of one block each, rewritten at odd sizes: at the end of the data
        // area the three runs lie back to back two blocks closer, which keeps them aligned.
        let pieces = [
            Piece::Kept { at: 0, len: 8 * B },
            Piece::New { len: 777 },
            Piece::Kept {
                at: 9 * B,
                len: 8 * B,
            },
            Piece::New { len: 555 },
            Piece::Kept {
                at: 18 * B,
                len: 8 * B,
            },
        ];
        let p = place(&pieces, B);
        assert_eq!(p.order, [0, 2, 4, 1, 3]);
        assert_eq!(p.shareable, 24 * B);
    }

    #[test]
    fn nothing_shareable_keeps_the_source_order_and_the_8_byte_start() {
        let pieces = [
            Piece::Kept { at: 8, len: 100 },
            Piece::New { len: 40 },
            Piece::Kept { at: 148, len: 60 },
        ];
        let p = place(&pieces, B);
        assert_eq!(p.order, [0, 1, 2]);
        assert_eq!(p.start_residue, None);
        assert_eq!(start_offset(101, p.start_residue, B), 104);
    }

    #[test]
    fn the_start_is_the_first_offset_with_the_residue() {
        assert_eq!(start_offset(100, Some(1000), B), 1000);
        assert_eq!(start_offset(1000, Some(1000), B), 1000);
        assert_eq!(start_offset(1001, Some(1000), B), 1000 + B);
        assert_eq!(start_offset(5000, Some(0), B), 2 * B);
    }
}
