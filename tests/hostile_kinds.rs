//! The kinds other than absolute tables, attacked: checkpoints crafted by a hostile author
//! (buffers of the wrong dtype, shape or values, masks with NaN, names that are prefixes of
//! others) and requests a careless user types (windows and grids whose sizes overflow, frame
//! counts past memory). Each must end with a documented exit code and a message naming the file
//! and the problem, with nothing written and the input unchanged — or with a correct result.
//! Never a panic, an abort, a hang or unbounded memory.
//!
//! The buffers are built here from their published constructions (common practice in
//! window-attention, decomposed-relative and rotary models), written independently of
//! posgrid's own code.

mod common;

use std::os::unix::process::CommandExt;
use std::path::PathBuf;
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use common::*;
use safetensors::Dtype;

/// What a finished run left.
struct Run {
    code: i32,
    stdout: String,
    stderr: String,
}

/// Run posgrid with `args`, under an address-space limit when one is given; fail the test if it
/// is still running after a minute (a hang).
fn run_limited(args: &[&str], address_limit: Option<u64>) -> Run {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_posgrid"));
    cmd.args(args)
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped());
    if let Some(bytes) = address_limit {
        // SAFETY: only async-signal-safe libc calls between fork and exec.
        unsafe {
            cmd.pre_exec(move || {
                let limit = libc::rlimit {
                    rlim_cur: bytes,
                    rlim_max: bytes,
                };
                if libc::setrlimit(libc::RLIMIT_AS, &limit) != 0 {
                    return Err(std::io::Error::last_os_error());
                }
                Ok(())
            });
        }
    }
    let mut child = cmd.spawn().unwrap();
    let (mut out, mut err) = (child.stdout.take().unwrap(), child.stderr.take().unwrap());
    let out = std::thread::spawn(move || {
        let mut s = String::new();
        std::io::Read::read_to_string(&mut out, &mut s).unwrap();
        s
    });
    let err = std::thread::spawn(move || {
        let mut s = String::new();
        std::io::Read::read_to_string(&mut err, &mut s).unwrap();
        s
    });
    let start = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().unwrap() {
            break status;
        }
        if start.elapsed() > Duration::from_secs(60) {
            child.kill().unwrap();
            let _ = child.wait();
            panic!("posgrid {args:?} still running after a minute: it hangs");
        }
        std::thread::sleep(Duration::from_millis(20));
    };
    use std::os::unix::process::ExitStatusExt;
    Run {
        code: status
            .code()
            .unwrap_or_else(|| 128 + status.signal().unwrap_or(0)),
        stdout: out.join().unwrap(),
        stderr: err.join().unwrap(),
    }
}

fn run(args: &[&str]) -> Run {
    run_limited(args, None)
}

/// Room for the program and its threads, not for a buffer of a gigabyte.
const ADDRESS_LIMIT: u64 = 768 << 20;

/// A checkpoint in its own directory, and its bytes as they were written.
struct Input {
    dir: tempfile::TempDir,
    path: PathBuf,
    bytes: Vec<u8>,
}

impl Input {
    fn new(tensors: &[T]) -> Input {
        let dir = tempfile::tempdir().unwrap();
        let path = write(dir.path(), "in.safetensors", tensors, None);
        let bytes = std::fs::read(&path).unwrap();
        Input { dir, path, bytes }
    }

    fn out(&self) -> PathBuf {
        self.dir.path().join("out.safetensors")
    }

    /// `resize IN -o OUT ARGS...`
    fn resize(&self, args: &[&str]) -> Run {
        self.resize_limited(args, None)
    }

    fn resize_limited(&self, args: &[&str], address_limit: Option<u64>) -> Run {
        let (input, out) = (s(&self.path).to_string(), s(&self.out()).to_string());
        let mut all = vec!["resize", &input, "-o", &out];
        all.extend_from_slice(args);
        run_limited(&all, address_limit)
    }

    fn scan(&self, args: &[&str]) -> Run {
        let input = s(&self.path).to_string();
        let mut all = vec!["scan", &input];
        all.extend_from_slice(args);
        run(&all)
    }

    /// The run ended with `code` and a message naming the file and saying each of `words`;
    /// nothing was written beside the input, and the input is unchanged.
    fn assert_refused(&self, r: &Run, code: i32, words: &[&str]) {
        assert_eq!(r.code, code, "exit code; stderr: {}", r.stderr);
        assert!(!r.stderr.contains("panicked"), "{}", r.stderr);
        assert!(
            r.stderr.contains(s(&self.path)),
            "names the file: {}",
            r.stderr
        );
        for w in words {
            assert!(r.stderr.contains(w), "should say \"{w}\": {}", r.stderr);
        }
        self.assert_untouched();
    }

    fn assert_untouched(&self) {
        assert_eq!(entries(self.dir.path()), ["in.safetensors"], "no output");
        assert_eq!(std::fs::read(&self.path).unwrap(), self.bytes, "input kept");
    }
}

// ------------------------------------------------------------------------------------------
// The constructions, from their description.

/// The window-relative index `[N, N]` (N = Wh·Ww, positions row-major): entry [a][b] is the
/// table row of the offset a − b, `(Δh + Wh − 1)(2Ww − 1) + (Δw + Ww − 1)` (common practice).
fn relative_index(wh: usize, ww: usize) -> Vec<i64> {
    let cells: Vec<(i64, i64)> = (0..wh as i64)
        .flat_map(|y| (0..ww as i64).map(move |x| (y, x)))
        .collect();
    let (wh, ww) = (wh as i64, ww as i64);
    let mut out = Vec::new();
    for a in &cells {
        for b in &cells {
            out.push((a.0 - b.0 + wh - 1) * (2 * ww - 1) + (a.1 - b.1 + ww - 1));
        }
    }
    out
}

/// Integers stored little-endian in `dtype` (values already known to fit).
fn ints(name: &str, dtype: Dtype, shape: &[usize], values: &[i64]) -> T {
    let width = dtype.bitsize() / 8;
    T {
        name: name.into(),
        dtype,
        shape: shape.to_vec(),
        bytes: values
            .iter()
            .flat_map(|v| v.to_le_bytes()[..width].to_vec())
            .collect(),
    }
}

/// The shifted-window mask `[nW, w², w²]` of a square `side` map: regions cut at `side − w`
/// and `side − shift` on each axis, 0 within a region, −100 across (common practice).
fn shifted_mask(side: usize, w: usize, shift: usize) -> Vec<f64> {
    let band = |p: usize| usize::from(p >= side - w) + usize::from(p >= side - shift);
    let mut out = Vec::new();
    for wy in 0..side / w {
        for wx in 0..side / w {
            let regions: Vec<usize> = (0..w * w)
                .map(|c| band(wy * w + c / w) * 3 + band(wx * w + c % w))
                .collect();
            for a in &regions {
                out.extend(regions.iter().map(|b| if a == b { 0.0 } else { -100.0 }));
            }
        }
    }
    out
}

/// The 2-D rotary cosine and sine buffers `[G², 2d]`: per axis t = i/G·L, frequencies
/// θ^(−2k/d) each used twice, the row's half first (the published construction).
fn rotary(g: usize, side: f64, d: usize, theta: f64) -> (Vec<f64>, Vec<f64>) {
    let freqs: Vec<f64> = (0..d)
        .map(|c| theta.powf(-((2 * (c / 2)) as f64) / d as f64))
        .collect();
    let (mut cos, mut sin) = (Vec::new(), Vec::new());
    for i in 0..g {
        for j in 0..g {
            for (pos, f) in [(i, &freqs), (j, &freqs)] {
                for fk in f {
                    let angle = pos as f64 / g as f64 * side * fk;
                    cos.push(angle.cos());
                    sin.push(angle.sin());
                }
            }
        }
    }
    (cos, sin)
}

/// A bias table of a `w×w` window and `heads` heads, in its block with its index buffer.
fn window_block(block: &str, w: usize, heads: usize, seed: u64) -> Vec<T> {
    let rows = (2 * w - 1) * (2 * w - 1);
    let n = w * w;
    vec![
        floats(
            &format!("{block}.attn.relative_position_bias_table"),
            Dtype::F32,
            &[rows, heads],
            &noise(rows * heads, seed, 1.0),
        ),
        ints(
            &format!("{block}.attn.relative_position_index"),
            Dtype::I64,
            &[n, n],
            &relative_index(w, w),
        ),
    ]
}

/// A window-7 shifted block on a 14×14 stage map (a window-attention hierarchy's first stage).
fn shifted_stage() -> Vec<T> {
    let mut t = window_block("layers.0.blocks.1", 7, 3, 1);
    t.push(floats(
        "layers.0.blocks.1.attn_mask",
        Dtype::F32,
        &[4, 49, 49],
        &shifted_mask(14, 7, 3),
    ));
    t
}

/// Windowed (span 14) and global (span 64) per-axis tables: the larger span is the grid.
fn axial_pairs() -> Vec<T> {
    let mut t = Vec::new();
    for (block, rows) in [(0, 27), (1, 127)] {
        for axis in ["h", "w"] {
            t.push(floats(
                &format!("blocks.{block}.attn.rel_pos_{axis}"),
                Dtype::F32,
                &[rows, 4],
                &noise(rows * 4, block as u64, 1.0),
            ));
        }
    }
    t
}

fn temporal() -> Vec<T> {
    vec![floats(
        "time_embed",
        Dtype::F32,
        &[1, 8, 24],
        &noise(8 * 24, 5, 1.0),
    )]
}

fn json(r: &Run) -> serde_json::Value {
    serde_json::from_str(&r.stdout).unwrap_or_else(|e| panic!("{e}: {}", r.stdout))
}

// ------------------------------------------------------------------------------------------

#[test]
fn a_checkpoint_of_other_kinds_only_scans_with_exit_0() {
    // Exit 4 means "no position table"; a window-attention or rotary checkpoint has tables.
    let window = Input::new(&window_block("layers.0.blocks.0", 7, 3, 1));
    let r = window.scan(&["--json"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(json(&r)["tables"][0]["kind"], "window_relative");
    let (cos, sin) = rotary(16, 16.0, 8, 10000.0);
    let rope = Input::new(&[
        floats("rope.freqs_cos", Dtype::F32, &[256, 16], &cos),
        floats("rope.freqs_sin", Dtype::F32, &[256, 16], &sin),
    ]);
    let r = rope.scan(&[]);
    assert_eq!(r.code, 0, "{}", r.stderr);
}

#[test]
fn a_window_that_overflows_the_row_count_of_a_per_axis_table_is_refused() {
    // 2·(2^63 + 1) − 1 rows wraps to 1 row in 64 bits: the table must not shrink to one row.
    let input = Input::new(&axial_pairs());
    let r = input.resize(&["--grid", "64", "--window", "9223372036854775809"]);
    input.assert_refused(&r, 6, &["blocks.0.attn.rel_pos_h", "too large"]);
}

#[test]
fn a_grid_that_overflows_a_stage_map_is_refused() {
    // (2^63 + 28)·14 wraps to 392 = 28·14: the mask must not be rebuilt for a 28x28 map.
    let input = Input::new(&shifted_stage());
    let r = input.resize(&["--grid", "9223372036854775836"]);
    input.assert_refused(&r, 6, &["layers.0.blocks.1.attn_mask", "too large"]);
}

#[test]
fn a_window_table_that_cannot_be_allocated_is_refused_not_aborted() {
    // Window 3000: 5999² offsets of 3 heads, about 430 MB per copy, under a 768 MiB limit. No
    // index buffer beside the table (its window read from the rows), so no index of 9 million
    // squared entries stops the request at the guard first.
    let mut tensors = window_block("layers.0.blocks.0", 7, 3, 1);
    tensors.truncate(1);
    let input = Input::new(&tensors);
    let r = input.resize_limited(
        &["--grid", "16", "--window", "3000", "--memory-limit", "64G"],
        Some(ADDRESS_LIMIT),
    );
    input.assert_refused(&r, 6, &["relative_position_bias_table", "memory"]);
}

#[test]
fn a_one_axis_table_that_cannot_be_allocated_is_refused_with_exit_6() {
    // 40 million frames of width 24: 3.8 GB, under a 768 MiB limit. Exit 6, not a usage error.
    let input = Input::new(&temporal());
    let r = input.resize_limited(
        &[
            "--grid",
            "16",
            "--frames",
            "40000000",
            "--memory-limit",
            "64G",
        ],
        Some(ADDRESS_LIMIT),
    );
    input.assert_refused(&r, 6, &["time_embed", "memory"]);
}

#[test]
fn a_source_grid_whose_cell_count_overflows_explains_no_table() {
    // (2^63 + 98)·2 wraps to 196 = 197 − 1 slot; 18446744073709550048·4294967297·4294967295
    // wraps to 1568 = 1569 − 1 slot. Neither is the grid of the table.
    let input = Input::new(&[floats(
        "pos_embed",
        Dtype::F32,
        &[1, 197, 8],
        &noise(197 * 8, 3, 1.0),
    )]);
    let r = input.scan(&["--json", "--source-grid", "9223372036854775906x2"]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    let found = json(&r);
    assert_eq!(found["tables"].as_array().unwrap().len(), 0, "{found}");
    assert_eq!(found["skipped"][0]["name"], "pos_embed");
    let video = Input::new(&[
        floats(
            "pos_embed",
            Dtype::F32,
            &[1, 1569, 4],
            &noise(1569 * 4, 4, 1.0),
        ),
        floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[4, 3, 2, 2, 2],
            &noise(96, 5, 1.0),
        ),
    ]);
    let r = video.scan(&[
        "--json",
        "--source-grid",
        "18446744073709550048x4294967297x4294967295",
    ]);
    assert_eq!(r.code, 4, "{}", r.stderr);
    assert_eq!(json(&r)["tables"].as_array().unwrap().len(), 0);
}

#[test]
fn targets_whose_sizes_overflow_are_refused_naming_the_file() {
    let table197 = [floats(
        "pos_embed",
        Dtype::F32,
        &[1, 197, 8],
        &noise(197 * 8, 3, 1.0),
    )];
    let video = [
        floats("pos_embed", Dtype::F32, &[1, 19, 4], &noise(19 * 4, 4, 1.0)),
        floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[4, 3, 2, 2, 2],
            &noise(96, 5, 1.0),
        ),
    ];
    let (cos, sin) = rotary(16, 16.0, 8, 10000.0);
    let rope = [
        floats("rope.freqs_cos", Dtype::F32, &[256, 16], &cos),
        floats("rope.freqs_sin", Dtype::F32, &[256, 16], &sin),
    ];
    // A lone table (window from its rows): no index buffer whose size trips the guard first.
    let mut window = window_block("layers.0.blocks.0", 7, 3, 1);
    window.truncate(1);
    let cases: [(&[T], &[&str], &str); 6] = [
        // (2·(2^62 + 1) − 1)² wraps to 1 row.
        (
            &window,
            &["--grid", "16", "--window", "4611686018427387905"],
            "relative_position_bias_table",
        ),
        // 2^61 frames of width 24: 24·2^61 wraps to 0 bytes.
        (
            &temporal(),
            &["--grid", "2305843009213693952x16x16"],
            "time_embed",
        ),
        // (2^63 + 98)·2 wraps to 196 rows.
        (&table197, &["--grid", "9223372036854775906x2"], "pos_embed"),
        // 2^32·2^32·1 wraps to 0 rows.
        (
            &video,
            &[
                "--source-grid",
                "2x3x3",
                "--grid",
                "4294967296x4294967296x1",
            ],
            "pos_embed",
        ),
        (&rope, &["--grid", "4294967296"], "rope.freqs_cos"),
        (&rope, &["--grid", "3037000500"], "rope.freqs_cos"),
    ];
    for (tensors, args, name) in cases {
        let input = Input::new(tensors);
        let r = input.resize(args);
        input.assert_refused(&r, 6, &[name]);
        assert!(
            r.stderr.contains("too large") || r.stderr.contains("--memory-limit"),
            "{args:?}: {}",
            r.stderr
        );
    }
}

#[test]
fn an_index_buffer_too_narrow_for_the_new_window_is_refused_before_any_work() {
    // A U8 index holds rows 0..168 of window 7; window 12 needs rows up to 528.
    let mut tensors = window_block("layers.0.blocks.0", 7, 3, 1);
    tensors[1] = ints(
        "layers.0.blocks.0.attn.relative_position_index",
        Dtype::U8,
        &[49, 49],
        &relative_index(7, 7),
    );
    let input = Input::new(&tensors);
    for dry in [true, false] {
        let mut args = vec!["--grid", "16", "--window", "12"];
        if dry {
            args.push("--dry-run");
        }
        let r = input.resize(&args);
        input.assert_refused(&r, 6, &["relative_position_index", "U8", "529"]);
    }
    // Window 8 (225 rows, indices up to 224) still fits U8 and is written.
    let r = input.resize(&["--grid", "16", "--window", "8"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
}

#[test]
fn a_mask_that_cannot_follow_its_table_stops_the_resize() {
    // A block whose table changes window but whose mask cannot be read back to its map would be
    // written with the old mask beside the new table: a checkpoint that no longer loads.
    let good = shifted_mask(14, 7, 3);
    let mut nan = good.clone();
    nan[0] = f64::NAN;
    let mut inf = good.clone();
    inf[3 * 49 * 49 + 48 * 49] = f64::NEG_INFINITY;
    let masks: [(&str, T); 5] = [
        (
            "NaN",
            floats(
                "layers.0.blocks.1.attn_mask",
                Dtype::F32,
                &[4, 49, 49],
                &nan,
            ),
        ),
        (
            "infinity",
            floats(
                "layers.0.blocks.1.attn_mask",
                Dtype::F32,
                &[4, 49, 49],
                &inf,
            ),
        ),
        (
            "empty",
            floats("layers.0.blocks.1.attn_mask", Dtype::F32, &[0, 49, 49], &[]),
        ),
        (
            "integers",
            ints(
                "layers.0.blocks.1.attn_mask",
                Dtype::I64,
                &[4, 49, 49],
                &good.iter().map(|v| *v as i64).collect::<Vec<_>>(),
            ),
        ),
        (
            "other cells",
            floats(
                "layers.0.blocks.1.attn_mask",
                Dtype::F32,
                &[4, 48, 48],
                &vec![0.0; 4 * 48 * 48],
            ),
        ),
    ];
    for (what, mask) in masks {
        let mut tensors = window_block("layers.0.blocks.1", 7, 3, 1);
        tensors.push(mask);
        let input = Input::new(&tensors);
        let r = input.resize(&["--grid", "24", "--window", "12"]);
        assert_eq!(r.code, 6, "{what}: {}", r.stderr);
        input.assert_refused(&r, 6, &["layers.0.blocks.1.attn_mask"]);
        // Scan says so too.
        let r = input.scan(&[]);
        assert!(
            r.stderr.contains("layers.0.blocks.1.attn_mask"),
            "{what}: {}",
            r.stderr
        );
    }
}

#[test]
fn requests_that_do_not_fit_the_file_name_it() {
    // A new window that does not split the stage's new map.
    let stage = Input::new(&shifted_stage());
    let r = stage.resize(&["--grid", "16", "--window", "12"]);
    stage.assert_refused(&r, 2, &["layers.0.blocks.1.attn_mask", "12x12"]);
    // Rotary buffers on a grid that is not square.
    let (cos, sin) = rotary(16, 16.0, 8, 10000.0);
    let rope = Input::new(&[
        floats("rope.freqs_cos", Dtype::F32, &[256, 16], &cos),
        floats("rope.freqs_sin", Dtype::F32, &[256, 16], &sin),
    ]);
    let r = rope.resize(&["--grid", "24x32"]);
    rope.assert_refused(&r, 2, &["rope.freqs_cos", "square"]);
    // The geometric method on a window that is not square.
    let odd = Input::new(&[
        floats(
            "blocks.0.attn.relative_position_bias_table",
            Dtype::F32,
            &[15, 2],
            &noise(30, 1, 1.0),
        ),
        ints(
            "blocks.0.attn.relative_position_index",
            Dtype::I64,
            &[6, 6],
            &relative_index(2, 3),
        ),
    ]);
    let r = odd.resize(&["--grid", "16", "--window", "12", "--relative", "geometric"]);
    odd.assert_refused(&r, 2, &["relative_position_bias_table", "square"]);
}

#[test]
fn rotary_buffers_stored_in_half_precision_rebuild_with_their_round_parameters() {
    // Stored in F16 or BF16, the values lose the last digits of θ and L; the round parameters
    // that fit them as well are the ones the model was built with (θ = 10000, L = 16).
    for dtype in [Dtype::F16, Dtype::BF16] {
        let (cos, sin) = rotary(24, 16.0, 32, 10000.0);
        let input = Input::new(&[
            floats("rope.freqs_cos", dtype, &[576, 64], &cos),
            floats("rope.freqs_sin", dtype, &[576, 64], &sin),
        ]);
        let r = input.scan(&["--json"]);
        assert_eq!(r.code, 0, "{}", r.stderr);
        let table = &json(&r)["tables"][0];
        assert_eq!(table["theta"], 10000.0, "{dtype:?}: {table}");
        assert_eq!(table["pretrain_side"], 16.0, "{dtype:?}: {table}");
        // Rebuilt at 32x32: the construction itself, rounded once to the dtype.
        let r = input.resize(&["--grid", "32"]);
        assert_eq!(r.code, 0, "{}", r.stderr);
        let bytes = std::fs::read(input.out()).unwrap();
        let out = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        let (want_cos, _) = rotary(32, 16.0, 32, 10000.0);
        let want = floats("x", dtype, &[1024, 64], &want_cos).bytes;
        assert!(
            out.tensor("rope.freqs_cos").unwrap().data() == want.as_slice(),
            "{dtype:?}"
        );
    }
    // Values within 1e-4 of the construction (README: recognised within 1e-4).
    let (cos, sin) = rotary(16, 16.0, 16, 10000.0);
    let wobble = noise(cos.len(), 9, 9e-5);
    let near = |v: &[f64], sign: f64| -> Vec<f64> {
        v.iter().zip(&wobble).map(|(x, e)| x + sign * e).collect()
    };
    let input = Input::new(&[
        floats("rope.freqs_cos", Dtype::F64, &[256, 32], &near(&cos, 1.0)),
        floats("rope.freqs_sin", Dtype::F64, &[256, 32], &near(&sin, -1.0)),
    ]);
    let r = input.scan(&["--json"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(json(&r)["tables"][0]["theta"], 10000.0);
}

#[test]
fn a_mask_belongs_to_its_own_block_not_to_one_whose_name_it_prefixes() {
    // `layers.0.blocks.1.attn_mask` sits in block 1; block 10's name starts with block 1's.
    let mut tensors = shifted_stage();
    tensors.extend(window_block("layers.0.blocks.10", 7, 3, 2));
    let input = Input::new(&tensors);
    let r = input.resize(&["--grid", "24", "--window", "12"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let bytes = std::fs::read(input.out()).unwrap();
    let out = safetensors::SafeTensors::deserialize(&bytes).unwrap();
    let mask = out.tensor("layers.0.blocks.1.attn_mask").unwrap();
    assert_eq!(mask.shape(), [4, 144, 144]);
    let want = floats("m", Dtype::F32, &[4, 144, 144], &shifted_mask(24, 12, 6));
    assert!(
        mask.data() == want.bytes.as_slice(),
        "the mask of a 24x24 map"
    );
    for block in [1, 10] {
        let index = out
            .tensor(&format!(
                "layers.0.blocks.{block}.attn.relative_position_index"
            ))
            .unwrap();
        let want = ints("i", Dtype::I64, &[144, 144], &relative_index(12, 12));
        assert!(index.data() == want.bytes.as_slice(), "block {block}");
    }
    assert_eq!(out.len(), tensors.len(), "no mask invented for block 10");
    assert_eq!(std::fs::read(&input.path).unwrap(), input.bytes);
}

/// One hostile file and request, and the exit code it must end with.
struct Case {
    what: &'static str,
    tensors: Vec<T>,
    args: &'static [&'static str],
    code: i32,
}

fn case(what: &'static str, tensors: Vec<T>, args: &'static [&'static str], code: i32) -> Case {
    Case {
        what,
        tensors,
        args,
        code,
    }
}

/// A window-7 table with `table` in place of its values, and its index.
fn window_with(table: T) -> Vec<T> {
    let mut t = window_block("b", 7, 3, 1);
    t[0] = table;
    t
}

/// A window-7 table with `index` in place of its index buffer.
fn index_with(index: T) -> Vec<T> {
    let mut t = window_block("b", 7, 3, 1);
    t[1] = index;
    t
}

fn hostile_cases() -> Vec<Case> {
    let table = "b.attn.relative_position_bias_table";
    let index = "b.attn.relative_position_index";
    let good_index = relative_index(7, 7);
    let mut negative = good_index.clone();
    negative[3 * 49 + 4] = -5;
    let mut past = good_index.clone();
    past[3 * 49 + 4] = 1 << 40;
    let mut nan_table = noise(169 * 3, 1, 1.0);
    nan_table[16] = f64::NAN;
    let mut near_max = noise(169 * 3, 1, 1.0);
    near_max[16] = 3.3e38;
    let (cos, sin) = rotary(16, 16.0, 8, 10000.0);
    let mut nan_cos = cos.clone();
    nan_cos[17 * 16 + 3] = f64::NAN;
    let mut inf_axis = noise(27 * 4, 0, 1.0);
    inf_axis[0] = f64::INFINITY;
    let mut axial_inf = axial_pairs();
    axial_inf[0] = floats("blocks.0.attn.rel_pos_h", Dtype::F32, &[27, 4], &inf_axis);
    let mut nan_frames = noise(8 * 24, 5, 1.0);
    nan_frames[50] = f64::NAN;
    let video = || {
        vec![
            floats("pos_embed", Dtype::F32, &[1, 19, 4], &noise(76, 4, 1.0)),
            floats(
                "patch_embed.proj.weight",
                Dtype::F32,
                &[4, 3, 2, 2, 2],
                &noise(96, 5, 1.0),
            ),
        ]
    };
    let ints_table = |dtype| ints(table, dtype, &[169, 3], &vec![1; 169 * 3]);
    let floats_table = |dtype| floats(table, dtype, &[169, 3], &noise(169 * 3, 1, 1.0));
    let w12: &[&str] = &["--grid", "16", "--window", "12"];
    vec![
        case(
            "no heads",
            window_with(floats(table, Dtype::F32, &[169, 0], &[])),
            w12,
            4,
        ),
        case(
            "100000 heads",
            vec![floats(table, Dtype::F32, &[1, 100000], &vec![0.0; 100000])],
            w12,
            4,
        ),
        case(
            "float index",
            index_with(floats(
                index,
                Dtype::F32,
                &[49, 49],
                &good_index.iter().map(|v| *v as f64).collect::<Vec<_>>(),
            )),
            w12,
            4,
        ),
        case(
            "index not square",
            index_with(ints(index, Dtype::I64, &[49, 48], &good_index[..49 * 48])),
            w12,
            4,
        ),
        case(
            "index of 3 axes",
            index_with(ints(index, Dtype::I64, &[1, 49, 49], &good_index)),
            w12,
            4,
        ),
        case(
            "negative index",
            index_with(ints(index, Dtype::I64, &[49, 49], &negative)),
            w12,
            4,
        ),
        case(
            "index past the table",
            index_with(ints(index, Dtype::I64, &[49, 49], &past)),
            w12,
            4,
        ),
        case(
            "boolean index",
            index_with(T {
                name: index.into(),
                dtype: Dtype::BOOL,
                shape: vec![49, 49],
                bytes: vec![1; 49 * 49],
            }),
            w12,
            4,
        ),
        case(
            "empty index",
            index_with(ints(index, Dtype::I64, &[0, 0], &[])),
            w12,
            4,
        ),
        case("F16 table", window_with(floats_table(Dtype::F16)), w12, 0),
        case("BF16 table", window_with(floats_table(Dtype::BF16)), w12, 0),
        case("F64 table", window_with(floats_table(Dtype::F64)), w12, 0),
        case("I32 table", window_with(ints_table(Dtype::I32)), w12, 4),
        case("I64 table", window_with(ints_table(Dtype::I64)), w12, 4),
        case("U8 table", window_with(ints_table(Dtype::U8)), w12, 4),
        case("I8 table", window_with(ints_table(Dtype::I8)), w12, 4),
        case(
            "NaN in the table",
            window_with(floats(table, Dtype::F32, &[169, 3], &nan_table)),
            w12,
            6,
        ),
        case(
            "NaN allowed",
            window_with(floats(table, Dtype::F32, &[169, 3], &nan_table)),
            &["--grid", "16", "--window", "12", "--allow-nonfinite"],
            0,
        ),
        case(
            "values near the F32 largest",
            window_with(floats(table, Dtype::F32, &[169, 3], &near_max)),
            w12,
            6,
        ),
        case(
            "window 1",
            window_block("b", 7, 3, 1),
            &["--grid", "16", "--window", "1"],
            0,
        ),
        case(
            "geometric to window 1",
            window_block("b", 7, 3, 1),
            &["--grid", "16", "--window", "1", "--relative", "geometric"],
            6,
        ),
        case(
            "rotary rows not a square",
            vec![floats(
                "rope.freqs_cos",
                Dtype::F32,
                &[255, 16],
                &cos[..255 * 16],
            )],
            &["--grid", "24"],
            4,
        ),
        case(
            "rotary width 6",
            vec![floats(
                "rope.freqs_cos",
                Dtype::F32,
                &[256, 6],
                &vec![1.0; 256 * 6],
            )],
            &["--grid", "24"],
            4,
        ),
        case(
            "rotary width 10",
            vec![floats(
                "rope.freqs_cos",
                Dtype::F32,
                &[256, 10],
                &vec![1.0; 2560],
            )],
            &["--grid", "24"],
            4,
        ),
        case(
            "rotary NaN",
            vec![
                floats("rope.freqs_cos", Dtype::F32, &[256, 16], &nan_cos),
                floats("rope.freqs_sin", Dtype::F32, &[256, 16], &sin),
            ],
            &["--grid", "24"],
            4,
        ),
        case(
            "rotary integers",
            vec![ints(
                "rope.freqs_cos",
                Dtype::I32,
                &[256, 16],
                &vec![1; 4096],
            )],
            &["--grid", "24"],
            4,
        ),
        case(
            "axial even rows",
            vec![floats(
                "blocks.0.attn.rel_pos_h",
                Dtype::F32,
                &[26, 4],
                &noise(104, 1, 1.0),
            )],
            &["--grid", "24", "--window", "12"],
            4,
        ),
        case(
            "axial one row",
            vec![floats(
                "blocks.0.attn.rel_pos_h",
                Dtype::F32,
                &[1, 4],
                &noise(4, 1, 1.0),
            )],
            &["--grid", "24", "--window", "12"],
            4,
        ),
        case(
            "axial no channels",
            vec![floats("blocks.0.attn.rel_pos_h", Dtype::F32, &[27, 0], &[])],
            &["--grid", "24", "--window", "12"],
            4,
        ),
        case(
            "axial infinity",
            axial_inf,
            &["--grid", "64", "--window", "12"],
            6,
        ),
        case(
            "axial to window 1",
            axial_pairs(),
            &["--grid", "64", "--window", "1"],
            0,
        ),
        case(
            "temporal of no frames",
            vec![floats("time_embed", Dtype::F32, &[1, 0, 8], &[])],
            &["--grid", "16", "--frames", "4"],
            4,
        ),
        case(
            "temporal of no width",
            vec![floats("time_embed", Dtype::F32, &[1, 8, 0], &[])],
            &["--grid", "16", "--frames", "4"],
            4,
        ),
        case(
            "temporal NaN",
            vec![floats("time_embed", Dtype::F32, &[1, 8, 24], &nan_frames)],
            &["--grid", "16", "--frames", "4"],
            6,
        ),
        case(
            "temporal to 4294967295 frames",
            temporal(),
            &["--grid", "16", "--frames", "4294967295"],
            6,
        ),
        case(
            "video source grid that does not fit",
            video(),
            &["--source-grid", "7x3x3", "--grid", "2x4x4"],
            4,
        ),
        case(
            "video source grid that fits",
            video(),
            &["--source-grid", "2x3x3", "--grid", "4x4x4"],
            0,
        ),
    ]
}

#[test]
fn hostile_tensors_end_in_a_documented_code_or_a_correct_file() {
    for c in hostile_cases() {
        let input = Input::new(&c.tensors);
        let r = input.resize(c.args);
        assert_eq!(r.code, c.code, "{}: {}", c.what, r.stderr);
        if c.code == 0 {
            let bytes = std::fs::read(input.out()).unwrap();
            safetensors::SafeTensors::deserialize(&bytes).unwrap();
            assert_eq!(
                std::fs::read(&input.path).unwrap(),
                input.bytes,
                "{}",
                c.what
            );
        } else {
            input.assert_refused(&r, c.code, &[]);
        }
    }
}

#[test]
fn names_with_escape_codes_reach_the_terminal_escaped() {
    let mut nan_table = noise(169 * 3, 1, 1.0);
    nan_table[0] = f64::NAN;
    let name = "blocks.0.\x1b[31mattn\x1b]0;title\x07.relative_position_bias_table";
    let input = Input::new(&[
        floats(name, Dtype::F32, &[169, 3], &nan_table),
        floats(
            "x\u{202e}.rel_pos_h",
            Dtype::F32,
            &[26, 4],
            &noise(104, 2, 1.0),
        ),
        floats("\x1b[2J.freqs_cos", Dtype::F32, &[16, 8], &vec![1.0; 128]),
    ]);
    for r in [
        input.scan(&[]),
        input.resize(&["--grid", "16", "--window", "12"]),
    ] {
        let all = format!("{}{}", r.stdout, r.stderr);
        assert!(!all.contains('\x1b') && !all.contains('\u{202e}'), "{all}");
        assert!(all.contains("\\x1b[31mattn"), "{all}");
    }
    input.assert_untouched();
}

/// A `.npy` array (format 1.0: magic, header length, a Python dict literal padded with spaces
/// and a newline to a multiple of 64 bytes, then the data; the numpy format's own rules).
fn npy(t: &T) -> Vec<u8> {
    let descr = match t.dtype {
        Dtype::F32 => "<f4",
        Dtype::I64 => "<i8",
        other => panic!("no descr for {other:?}"),
    };
    let dims: Vec<String> = t.shape.iter().map(|n| n.to_string()).collect();
    let shape = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    let mut header = format!("{{'descr': '{descr}', 'fortran_order': False, 'shape': {shape}, }}");
    while (10 + header.len() + 1) % 64 != 0 {
        header.push(' ');
    }
    header.push('\n');
    let mut out = b"\x93NUMPY\x01\x00".to_vec();
    out.extend((header.len() as u16).to_le_bytes());
    out.extend(header.as_bytes());
    out.extend(&t.bytes);
    out
}

#[test]
fn a_mask_the_resized_model_no_longer_has_is_left_out_of_every_container() {
    // Window 7 on a 14x14 map with shift 3; at window 14 the window covers the map, the block
    // no longer shifts and has no mask (common practice): the mask must go, everywhere.
    let args = ["--grid", "14", "--window", "14"];
    let mask = "layers.0.blocks.1.attn_mask";

    // A sharded set: the mask in a shard of its own with a tensor that does not change.
    let dir = tempfile::tempdir().unwrap();
    let set = dir.path().join("set");
    std::fs::create_dir(&set).unwrap();
    let mut stage = shifted_stage();
    let mask_tensor = stage.pop().unwrap();
    write(&set, "a.safetensors", &stage, None);
    let norm = floats("norm.weight", Dtype::F32, &[8], &[1.0; 8]);
    write(&set, "b.safetensors", &[mask_tensor, norm], None);
    let index = serde_json::json!({
        "metadata": {"total_size": 0},
        "weight_map": {
            "layers.0.blocks.1.attn.relative_position_bias_table": "a.safetensors",
            "layers.0.blocks.1.attn.relative_position_index": "a.safetensors",
            mask: "b.safetensors",
            "norm.weight": "b.safetensors",
        }
    });
    std::fs::write(set.join("model.safetensors.index.json"), index.to_string()).unwrap();
    let out = dir.path().join("out");
    let mut all = vec!["resize", s(&set), "-o", s(&out)];
    all.extend(args);
    let r = run(&all);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let index: serde_json::Value =
        serde_json::from_slice(&std::fs::read(out.join("model.safetensors.index.json")).unwrap())
            .unwrap();
    let weight_map = index["weight_map"].as_object().unwrap();
    assert!(!weight_map.contains_key(mask), "{weight_map:?}");
    let mut held = Vec::new();
    for shard in ["a.safetensors", "b.safetensors"] {
        let bytes = std::fs::read(out.join(shard)).unwrap();
        let st = safetensors::SafeTensors::deserialize(&bytes).unwrap();
        for name in st.names() {
            let name: &str = name;
            assert_eq!(weight_map[name], shard, "{name} listed where it is");
            held.push(name.to_string());
        }
    }
    held.sort();
    let mut listed: Vec<String> = weight_map.keys().cloned().collect();
    listed.sort();
    assert_eq!(held, listed, "the index lists exactly what the shards hold");

    // An npz archive (members written with the zip crate, arrays by the npy rules).
    let npz = dir.path().join("in.npz");
    {
        let mut zip = zip::ZipWriter::new(std::fs::File::create(&npz).unwrap());
        let stored = zip::write::SimpleFileOptions::default()
            .compression_method(zip::CompressionMethod::Stored);
        for t in shifted_stage() {
            zip.start_file(format!("{}.npy", t.name.replace('.', "/")), stored)
                .unwrap();
            std::io::Write::write_all(&mut zip, &npy(&t)).unwrap();
        }
        zip.finish().unwrap();
    }
    let npz_out = dir.path().join("out.npz");
    let mut all = vec!["resize", s(&npz), "-o", s(&npz_out)];
    all.extend(args);
    let r = run(&all);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let archive = zip::ZipArchive::new(std::fs::File::open(&npz_out).unwrap()).unwrap();
    let mut members: Vec<String> = archive
        .file_names()
        .map(|n| n.unwrap().into_owned())
        .collect();
    members.sort();
    assert_eq!(
        members,
        [
            "layers/0/blocks/1/attn/relative_position_bias_table.npy",
            "layers/0/blocks/1/attn/relative_position_index.npy"
        ]
    );

    // A PyTorch file of the framework's own (`{"model": state dict, "epoch": 3}`): written back
    // as the same tree, less the mask.
    let pth = concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/fixtures/kinds/window_mask_wrapped.pth"
    );
    let pth_out = dir.path().join("out.pth");
    let mut all = vec!["resize", pth, "-o", s(&pth_out)];
    all.extend(args);
    let r = run(&all);
    assert_eq!(r.code, 0, "{}", r.stderr);
    let written = posgrid::checkpoint::Source::open(&pth_out).unwrap();
    let torch = written
        .downcast::<posgrid::checkpoint::torch::TorchFile>()
        .unwrap();
    assert_eq!(torch.root_keys(), ["model", "epoch"], "the tree is kept");
    use posgrid::checkpoint::TensorSource;
    let names: Vec<&str> = written.entries().iter().map(|t| t.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "model/layers.0.blocks.1.attn.relative_position_bias_table",
            "model/layers.0.blocks.1.attn.relative_position_index",
            "model/norm.weight"
        ]
    );
}

#[test]
fn a_companion_named_alone_and_flags_no_table_follows_are_said_so() {
    // The index buffer follows its table: naming it alone is answered with the table's name.
    let input = Input::new(&window_block("layers.0.blocks.0", 7, 3, 1));
    let index = "layers.0.blocks.0.attn.relative_position_index";
    let r = input.resize(&["--grid", "16", "--window", "12", "--tensor", index]);
    input.assert_refused(
        &r,
        4,
        &[index, "layers.0.blocks.0.attn.relative_position_bias_table"],
    );
    // --window and --frames on a file with nothing that follows them: said, not silent.
    let (cos, sin) = rotary(16, 16.0, 8, 10000.0);
    let rope = Input::new(&[
        floats("rope.freqs_cos", Dtype::F32, &[256, 16], &cos),
        floats("rope.freqs_sin", Dtype::F32, &[256, 16], &sin),
    ]);
    let r = rope.resize(&["--grid", "24", "--window", "12", "--frames", "4"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        r.stderr.contains("--window 12x12") && r.stderr.contains("4 frames"),
        "{}",
        r.stderr
    );
}

#[test]
fn a_file_of_twenty_thousand_window_tables_is_read_and_resized_in_seconds() {
    // Each table looked up its index buffer and masks with a pass over every tensor (and
    // planning and writing looked up each tensor among every change): 20 000 tables of a
    // 3 MB file took over five minutes to scan. Linear work takes well under a second.
    let tensors: Vec<T> = (0..20_000)
        .map(|i| {
            floats(
                &format!("b{i}.attn.relative_position_bias_table"),
                Dtype::F32,
                &[9, 1],
                &[0.5; 9],
            )
        })
        .collect();
    let input = Input::new(&tensors);
    let start = Instant::now();
    let r = input.scan(&["--json"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert_eq!(json(&r)["tables"].as_array().unwrap().len(), 20_000);
    assert!(
        start.elapsed() < Duration::from_secs(20),
        "scan took {:?}",
        start.elapsed()
    );
    let start = Instant::now();
    let r = input.resize(&["--grid", "8", "--window", "3", "--quiet"]);
    assert_eq!(r.code, 0, "{}", r.stderr);
    assert!(
        start.elapsed() < Duration::from_secs(40),
        "resize took {:?}",
        start.elapsed()
    );
    // Each table alone is tiny, but the job keeps every result and its records (about 11 KB a
    // table, measured) until the output is written: 20 000 of them do not fit 64 MiB, and the
    // guard says so before computing anything (before, it was exceeded fourfold, unchecked).
    std::fs::remove_file(input.out()).unwrap();
    let r = input.resize(&["--grid", "8", "--window", "3", "--memory-limit", "64M"]);
    input.assert_refused(&r, 6, &["20000 tensors", "--memory-limit"]);
}

/// Two tables that each fit the guard but together do not: the results of both are held until
/// the output is written, so the sum is what the guard checks (each alone passes it).
#[test]
fn tables_that_fit_the_guard_one_by_one_but_not_together_are_refused() {
    let table = |name: &str| floats(name, Dtype::F32, &[1, 257, 64], &vec![0.25; 257 * 64]);
    let both = Input::new(&[table("a.pos_embed"), table("b.pos_embed")]);
    let one = Input::new(&[table("a.pos_embed")]);
    let args = ["--grid", "128", "--memory-limit", "24M", "--quiet"];
    let r = one.resize(&args);
    assert_eq!(r.code, 0, "one table alone fits: {}", r.stderr);
    let r = both.resize(&args);
    both.assert_refused(&r, 6, &["2 tensors", "--memory-limit"]);
}

/// A window the geometric method's bisection cannot reach (7 → 1: no ratio in the shrinking
/// bracket places the outermost offset) is refused, by a dry run as by a resize. Since the
/// check moved to planning, it comes before any table's values are read or computed.
#[test]
fn an_unreachable_geometric_window_is_refused_by_a_dry_run() {
    let input = Input::new(&window_block("b", 7, 3, 1));
    let args = ["--grid", "16", "--window", "1", "--relative", "geometric"];
    let dry: Vec<&str> = args.iter().copied().chain(["--dry-run"]).collect();
    for run in [&args[..], &dry[..]] {
        let r = input.resize(run);
        input.assert_refused(&r, 6, &["outermost offset"]);
    }
}
