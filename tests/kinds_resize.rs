//! The binary end to end on the checkpoints of fixtures/kinds (one per kind of grid-dependent
//! tensor), each check against a source outside posgrid's code:
//! - resampled tables: the expected files written with torch's `F.interpolate` by
//!   fixtures/kinds/make_kind_cases.py; the call behind each tensor is recorded in
//!   fixtures/kinds/manifest.json and quoted when a check fails; tolerance 5e-5 of the
//!   reference's largest magnitude;
//! - untouched tensors: the sha256 the generator recorded in the manifest (computed here with
//!   SHA-256 written from FIPS 180-4) and the input's own bytes;
//! - rebuilt buffers (window-relative index, shifted-window mask, 2-D rotary buffers): the
//!   published constructions (common practice), written again below from their description, and
//!   first checked against the generator's buffers in the inputs;
//! - `--relative geometric`: scipy's RectBivariateSpline (s = 0) at the geometric-progression
//!   coordinates, fixtures/golden/geometric_window_class_rows.safetensors, written by
//!   fixtures/golden/make_geometric_golden.py;
//! - JSON fields, exit codes and refusals: README ("Kinds of grid-dependent tensors", "Exit
//!   codes").

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::process::Output;

use common::{code, entries, posgrid, s, stderr};
use safetensors::{Dtype, SafeTensors};
use serde_json::{json, Value};

const KINDS: &str = "fixtures/kinds";
/// Resampled values may differ from torch's by this much of the reference's largest magnitude.
const RELATIVE_TOL: f64 = 5e-5;
/// Rebuilt rotary buffers against the construction in float64 (cos and sin are at most 1).
const ROTARY_TOL: f64 = 1e-6;
/// Mask value between positions of different regions of a shifted window (common practice).
const ACROSS_REGIONS: f32 = -100.0;
/// README Exit codes.
const USAGE: i32 = 2;
const AMBIGUOUS: i32 = 4;

// ---------------------------------------------------------------------------------------------
// The manifest, checkpoints read back with the reference safetensors crate, and runs.

fn manifest() -> Value {
    let text = std::fs::read_to_string(format!("{KINDS}/manifest.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn case(name: &str) -> Value {
    manifest()["cases"][name].clone()
}

fn strings(v: &Value) -> Vec<String> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|x| x.as_str().unwrap().to_string())
        .collect()
}

fn keys(v: &Value) -> Vec<String> {
    v.as_object().unwrap().keys().cloned().collect()
}

fn input_of(case: &Value) -> String {
    format!("{KINDS}/{}", case["input"].as_str().unwrap())
}

struct Checkpoint {
    bytes: Vec<u8>,
}

impl Checkpoint {
    fn open(path: impl AsRef<Path>) -> Checkpoint {
        let path = path.as_ref();
        let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
        SafeTensors::deserialize(&bytes).unwrap();
        Checkpoint { bytes }
    }

    fn tensors(&self) -> SafeTensors<'_> {
        SafeTensors::deserialize(&self.bytes).unwrap()
    }

    fn names(&self) -> BTreeSet<String> {
        self.tensors()
            .names()
            .into_iter()
            .map(str::to_string)
            .collect()
    }

    fn raw(&self, name: &str) -> Vec<u8> {
        self.tensors()
            .tensor(name)
            .unwrap_or_else(|_| panic!("no tensor {name}"))
            .data()
            .to_vec()
    }

    fn shape(&self, name: &str) -> Vec<usize> {
        self.tensors().tensor(name).unwrap().shape().to_vec()
    }

    fn dtype(&self, name: &str) -> Dtype {
        self.tensors().tensor(name).unwrap().dtype()
    }

    fn floats(&self, name: &str) -> Vec<f64> {
        let raw = self.raw(name);
        match self.dtype(name) {
            Dtype::F32 => raw
                .chunks_exact(4)
                .map(|b| f32::from_le_bytes(b.try_into().unwrap()) as f64)
                .collect(),
            Dtype::F64 => raw
                .chunks_exact(8)
                .map(|b| f64::from_le_bytes(b.try_into().unwrap()))
                .collect(),
            d => panic!("{name}: not a float tensor ({d})"),
        }
    }

    fn ints(&self, name: &str) -> Vec<i64> {
        assert_eq!(self.dtype(name), Dtype::I64, "{name}");
        self.raw(name)
            .chunks_exact(8)
            .map(|b| i64::from_le_bytes(b.try_into().unwrap()))
            .collect()
    }

    fn metadata(&self) -> BTreeMap<String, String> {
        let (_, meta) = SafeTensors::read_metadata(&self.bytes).unwrap();
        meta.metadata()
            .clone()
            .unwrap_or_default()
            .into_iter()
            .collect()
    }

    /// posgrid's provenance record: the `posgrid` metadata key, a JSON string.
    fn provenance(&self) -> Value {
        let text = self.metadata().remove("posgrid").expect("a posgrid record");
        serde_json::from_str(&text).expect("the posgrid record is JSON")
    }
}

/// One `posgrid resize INPUT -o OUT ARGS --json` in a fresh temporary directory.
struct Resized {
    dir: tempfile::TempDir,
    out: PathBuf,
    run: Output,
    report: Value,
}

impl Resized {
    fn output(&self) -> Checkpoint {
        Checkpoint::open(&self.out)
    }

    /// The report's table entry that names `tensor` or lists it as a companion.
    fn entry_for(&self, tensor: &str) -> Option<&Value> {
        self.report["tables"].as_array()?.iter().find(|t| {
            t["name"] == tensor
                || t["companions"]
                    .as_array()
                    .is_some_and(|c| c.iter().any(|n| n == tensor))
        })
    }
}

fn resize(input: &str, args: &[&str]) -> Resized {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.safetensors");
    let mut all = vec!["resize", input, "-o", s(&out)];
    all.extend_from_slice(args);
    all.push("--json");
    let run = posgrid(&all);
    let report = serde_json::from_slice(&run.stdout).unwrap_or(Value::Null);
    Resized {
        dir,
        out,
        run,
        report,
    }
}

/// Resize a manifest case with its recorded arguments (and `extra`); it must succeed.
fn resize_case(name: &str, extra: &[&str]) -> Resized {
    let c = case(name);
    let mut args = strings(&c["args"]);
    args.extend(extra.iter().map(|a| a.to_string()));
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    let r = resize(&input_of(&c), &args);
    assert_eq!(code(&r.run), 0, "{name} {args:?}: {}", stderr(&r.run));
    r
}

fn scan(input: &str, args: &[&str]) -> (Output, Value) {
    let mut all = vec!["scan", input, "--json"];
    all.extend_from_slice(args);
    let run = posgrid(&all);
    let report = serde_json::from_slice(&run.stdout).unwrap_or(Value::Null);
    (run, report)
}

fn largest(v: &[f64]) -> f64 {
    v.iter().fold(0.0, |m, x| m.max(x.abs()))
}

fn largest_gap(got: &[f64], want: &[f64]) -> f64 {
    assert_eq!(got.len(), want.len());
    got.iter()
        .zip(want)
        .map(|(g, w)| (g - w).abs())
        .fold(0.0, f64::max)
}

/// The kind the README's kinds table gives a tensor of this name.
fn kind_of(name: &str) -> &'static str {
    let ends = |suffixes: &[&str]| suffixes.iter().any(|x| name.ends_with(x));
    if ends(&[
        "relative_position_bias_table",
        "relative_position_index",
        "attn_mask",
    ]) {
        "window_relative"
    } else if ends(&["rel_pos_h", "rel_pos_w"]) {
        "axial_relative"
    } else if ends(&["freqs_cos", "freqs_sin"]) {
        "rotary"
    } else if ends(&["time_embed"]) {
        "temporal"
    } else if ends(&["pos_embed"]) {
        "learned"
    } else {
        panic!("no kind expected for {name}")
    }
}

/// README kinds table: rotary buffers are rebuilt, every other kind resampled.
fn method_of(kind: &str) -> &'static str {
    if kind == "rotary" {
        "rebuilt"
    } else {
        "resampled"
    }
}

/// The first `AxB` in a text, as (A, B).
fn sides_in(text: &str) -> (usize, usize) {
    text.split(|c: char| !(c.is_ascii_digit() || c == 'x'))
        .find_map(|w| {
            let (a, b) = w.split_once('x')?;
            Some((a.parse().ok()?, b.parse().ok()?))
        })
        .unwrap_or_else(|| panic!("no AxB in {text:?}"))
}

/// The number after `word ` in a text.
fn number_after(text: &str, word: &str) -> usize {
    let rest = &text[text
        .find(word)
        .unwrap_or_else(|| panic!("{word} in {text:?}"))
        + word.len()..];
    let digits: String = rest
        .trim_start()
        .chars()
        .take_while(char::is_ascii_digit)
        .collect();
    digits.parse().unwrap()
}

fn write_i64(name: &str, shape: &[usize], values: &[i64]) -> common::T {
    common::T {
        name: name.into(),
        dtype: Dtype::I64,
        shape: shape.to_vec(),
        bytes: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
    }
}

// ---------------------------------------------------------------------------------------------
// SHA-256 (FIPS 180-4), for the digests the manifest records.

fn sha256_hex(data: &[u8]) -> String {
    // The constants are the first 32 bits of the fractional parts of the cube roots of the first
    // 64 primes (round constants) and of the square roots of the first 8 (initial state).
    let primes: Vec<u32> = (2u32..)
        .filter(|n| (2..*n).take_while(|d| d * d <= *n).all(|d| n % d != 0))
        .take(64)
        .collect();
    let frac32 = |x: f64| ((x - x.floor()) * 4_294_967_296.0) as u32;
    let k: Vec<u32> = primes
        .iter()
        .map(|&p| frac32(f64::from(p).cbrt()))
        .collect();
    let mut state: Vec<u32> = primes[..8]
        .iter()
        .map(|&p| frac32(f64::from(p).sqrt()))
        .collect();
    let mut message = data.to_vec();
    message.push(0x80);
    while message.len() % 64 != 56 {
        message.push(0);
    }
    message.extend_from_slice(&((data.len() as u64) * 8).to_be_bytes());
    for block in message.chunks_exact(64) {
        let mut w = [0u32; 64];
        for (i, word) in block.chunks_exact(4).enumerate() {
            w[i] = u32::from_be_bytes(word.try_into().unwrap());
        }
        for i in 16..64 {
            let s0 = w[i - 15].rotate_right(7) ^ w[i - 15].rotate_right(18) ^ (w[i - 15] >> 3);
            let s1 = w[i - 2].rotate_right(17) ^ w[i - 2].rotate_right(19) ^ (w[i - 2] >> 10);
            w[i] = w[i - 16]
                .wrapping_add(s0)
                .wrapping_add(w[i - 7])
                .wrapping_add(s1);
        }
        let mut v: [u32; 8] = state.clone().try_into().unwrap();
        for i in 0..64 {
            let [a, b, c, d, e, f, g, h] = v;
            let s1 = e.rotate_right(6) ^ e.rotate_right(11) ^ e.rotate_right(25);
            let choice = (e & f) ^ (!e & g);
            let t1 = h
                .wrapping_add(s1)
                .wrapping_add(choice)
                .wrapping_add(k[i])
                .wrapping_add(w[i]);
            let s0 = a.rotate_right(2) ^ a.rotate_right(13) ^ a.rotate_right(22);
            let majority = (a & b) ^ (a & c) ^ (b & c);
            let t2 = s0.wrapping_add(majority);
            v = [t1.wrapping_add(t2), a, b, c, d.wrapping_add(t1), e, f, g];
        }
        for (s, x) in state.iter_mut().zip(v) {
            *s = s.wrapping_add(x);
        }
    }
    state.iter().map(|x| format!("{x:08x}")).collect()
}

#[test]
fn sha256_matches_the_published_test_vectors() {
    // FIPS 180-4 examples (values from memory, common knowledge).
    assert_eq!(
        sha256_hex(b""),
        "e3b0c44298fc1c149afbf4c8996fb92427ae41e4649b934ca495991b7852b855"
    );
    assert_eq!(
        sha256_hex(b"abc"),
        "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    );
    assert_eq!(
        sha256_hex(b"abcdbcdecdefdefgefghfghighijhijkijkljklmklmnlmnomnopnopq"),
        "248d6a61d20638b8e5c026930c3e6039a33ce45964ff2167f6ecedd419db06c1"
    );
}

// ---------------------------------------------------------------------------------------------
// The published constructions, written from their description.

/// Window-relative index `[N, N]` (N = Wh·Ww, positions row-major in the window), or with
/// `class` `[N+1, N+1]`: entry (q, k) is the table row of the offset from key k to query q,
/// `(Δh + Wh − 1)(2Ww − 1) + (Δw + Ww − 1)`; with a class position first, row 0 reads the
/// class→token row M−3, column 0 the token→class row M−2, and (0, 0) the class→class row M−1,
/// M being the table's row count `(2Wh − 1)(2Ww − 1) + 3` (BEiT-style, common practice).
fn window_index(wh: usize, ww: usize, class: bool) -> Vec<i64> {
    let offsets = ((2 * wh - 1) * (2 * ww - 1)) as i64;
    let rows = offsets + 3;
    let lead = usize::from(class);
    let n = wh * ww + lead;
    let mut index = vec![0i64; n * n];
    for q in 0..n {
        for k in 0..n {
            index[q * n + k] = match (q.checked_sub(lead), k.checked_sub(lead)) {
                (None, None) => rows - 1,
                (None, Some(_)) => rows - 3,
                (Some(_), None) => rows - 2,
                (Some(q), Some(k)) => {
                    let dh = (q / ww) as i64 - (k / ww) as i64;
                    let dw = (q % ww) as i64 - (k % ww) as i64;
                    (dh + wh as i64 - 1) * (2 * ww as i64 - 1) + (dw + ww as i64 - 1)
                }
            };
        }
    }
    index
}

/// The band of one coordinate of a shifted map: before `side − window`, up to `side − shift`,
/// or after.
fn band(x: usize, side: usize, window: usize, shift: usize) -> usize {
    if x < side - window {
        0
    } else if x < side - shift {
        1
    } else {
        2
    }
}

/// Shifted-window mask `[nW, w², w²]` for an `h × w` map (common practice): windows row-major
/// over the map, positions row-major in a window; 0 between two positions of one region,
/// −100 across regions.
fn shift_mask(map_h: usize, map_w: usize, window: usize, shift: usize) -> Vec<f32> {
    let region =
        |y: usize, x: usize| band(y, map_h, window, shift) * 3 + band(x, map_w, window, shift);
    let n = window * window;
    let mut mask = Vec::with_capacity(map_h / window * map_w / window * n * n);
    for wy in 0..map_h / window {
        for wx in 0..map_w / window {
            let label = |p: usize| region(wy * window + p / window, wx * window + p % window);
            for q in 0..n {
                for k in 0..n {
                    let same = label(q) == label(k);
                    mask.push(if same { 0.0 } else { ACROSS_REGIONS });
                }
            }
        }
    }
    mask
}

/// The 2-D rotary angles `[G², 2d]` (common practice): per axis positions `t = i·L/G`,
/// frequencies `θ^(−2k/d)` for `k < d/2`, each used twice in a row; the row of cell (i, j) is
/// the angles of i followed by those of j.
fn rotary_angles(grid: usize, pretrain_side: f64, axis_width: usize, theta: f64) -> Vec<f64> {
    let per_axis = |i: usize| -> Vec<f64> {
        let t = i as f64 * pretrain_side / grid as f64;
        (0..axis_width)
            .map(|c| t * theta.powf(-2.0 * (c / 2) as f64 / axis_width as f64))
            .collect()
    };
    let mut angles = Vec::with_capacity(grid * grid * 2 * axis_width);
    for i in 0..grid {
        for j in 0..grid {
            angles.extend(per_axis(i));
            angles.extend(per_axis(j));
        }
    }
    angles
}

// ---------------------------------------------------------------------------------------------
// 1. Every case of the manifest against torch, the rest byte-identical, the report.

/// Rows that the manifest's source says are kept as they were: (leading, trailing) counts.
fn kept_rows(source: &str) -> (usize, usize) {
    if source.contains("last 3 rows of table unchanged") {
        (0, 3)
    } else if source.starts_with("first ") && source.contains("row(s) unchanged") {
        (number_after(source, "first"), 0)
    } else {
        (0, 0)
    }
}

fn check_expected_tensors(name: &str, c: &Value, input: &Checkpoint, out: &Checkpoint) {
    let expected = Checkpoint::open(format!("{KINDS}/{}", c["expected"].as_str().unwrap()));
    for (tensor, spec) in c["expected_tensors"].as_object().unwrap() {
        let source = spec["source"].as_str().unwrap();
        let shape: Vec<usize> = serde_json::from_value(spec["shape"].clone()).unwrap();
        assert_eq!(out.shape(tensor), shape, "{name}/{tensor} shape ({source})");
        assert_eq!(out.dtype(tensor), Dtype::F32, "{name}/{tensor} dtype");
        let want = expected.floats(tensor);
        let got = out.floats(tensor);
        let gap = largest_gap(&got, &want);
        let bound = RELATIVE_TOL * largest(&want);
        assert!(
            gap <= bound,
            "{name}/{tensor}: off by {gap:.3e} (bound {bound:.3e}) from the torch reference: {source}"
        );
        let (lead, trail) = kept_rows(source);
        if lead + trail > 0 {
            // The class rows are copied, not recomputed (README: class rows bit-exact).
            let row = 4 * shape.last().unwrap();
            let (was, now) = (input.raw(tensor), out.raw(tensor));
            assert_eq!(was[..lead * row], now[..lead * row], "{name}/{tensor} lead");
            assert_eq!(
                was[was.len() - trail * row..],
                now[now.len() - trail * row..],
                "{name}/{tensor} class rows"
            );
        }
    }
}

fn check_untouched(name: &str, c: &Value, input: &Checkpoint, out: &Checkpoint) {
    // The manifest's digests: the generator's record of what must come out unchanged.
    for (tensor, spec) in c["untouched"].as_object().unwrap() {
        let bytes = out.raw(tensor);
        assert_eq!(
            sha256_hex(&bytes),
            spec["sha256"].as_str().unwrap(),
            "{name}/{tensor}: sha256 differs from the manifest"
        );
    }
    // And every tensor that is neither expected nor rebuilt equals the input's bytes.
    let mut changed = keys(&c["expected_tensors"]);
    changed.extend(keys(&c["rebuilt"]));
    assert_eq!(out.names(), input.names(), "{name}: the tensor list");
    for tensor in input.names() {
        if !changed.contains(&tensor) {
            assert_eq!(out.dtype(&tensor), input.dtype(&tensor), "{name}/{tensor}");
            assert_eq!(out.shape(&tensor), input.shape(&tensor), "{name}/{tensor}");
            assert!(
                out.raw(&tensor) == input.raw(&tensor),
                "{name}/{tensor}: bytes changed"
            );
        }
    }
}

fn check_report(name: &str, c: &Value, r: &Resized) {
    assert_eq!(r.report["dry_run"], false, "{name}");
    let mut changed = keys(&c["expected_tensors"]);
    changed.extend(keys(&c["rebuilt"]));
    for tensor in &changed {
        let entry = r
            .entry_for(tensor)
            .unwrap_or_else(|| panic!("{name}: the report does not list {tensor}"));
        let kind = kind_of(tensor);
        assert_eq!(entry["kind"], kind, "{name}/{tensor}: kind in the report");
        assert_eq!(entry["method"], method_of(kind), "{name}/{tensor}: method");
    }
    let out = r.output();
    for (tensor, spec) in c["rebuilt"].as_object().unwrap() {
        let shape: Vec<usize> = serde_json::from_value(spec["shape"].clone()).unwrap();
        assert_eq!(out.shape(tensor), shape, "{name}/{tensor}: rebuilt shape");
        let dtype = spec["dtype"].as_str().unwrap();
        assert_eq!(out.dtype(tensor).to_string(), dtype, "{name}/{tensor}");
    }
}

#[test]
fn every_case_matches_torch_and_leaves_the_rest_byte_identical() {
    let m = manifest();
    let names = keys(&m["cases"]);
    assert_eq!(names.len(), 8, "cases of the manifest: {names:?}");
    for name in names {
        let c = &m["cases"][&name];
        let r = resize_case(&name, &[]);
        let input = Checkpoint::open(input_of(c));
        let out = r.output();
        check_expected_tensors(&name, c, &input, &out);
        check_untouched(&name, c, &input, &out);
        check_report(&name, c, &r);
    }
}

// ---------------------------------------------------------------------------------------------
// 2. Rebuilt buffers against the constructions.

#[test]
fn constructions_agree_with_the_generators_buffers_in_the_inputs() {
    // The test's constructions and the generator's (torch) ones, written apart, must agree on
    // the source buffers before either is used to judge posgrid.
    let stages = Checkpoint::open(format!("{KINDS}/window_stages.safetensors"));
    for tensor in stages.names() {
        if tensor.ends_with("relative_position_index") {
            assert_eq!(stages.ints(&tensor), window_index(7, 7, false), "{tensor}");
        }
    }
    let mask = stages.floats("layers.0.blocks.1.attn_mask");
    let want: Vec<f64> = shift_mask(14, 14, 7, 3)
        .into_iter()
        .map(f64::from)
        .collect();
    assert_eq!(mask, want, "the 14x14 map's mask, window 7, shift 3");
    for file in ["window_class_rows", "window_class_rows_blocks"] {
        let ckpt = Checkpoint::open(format!("{KINDS}/{file}.safetensors"));
        for tensor in ckpt.names() {
            if tensor.ends_with("relative_position_index") {
                assert_eq!(
                    ckpt.ints(&tensor),
                    window_index(8, 8, true),
                    "{file}/{tensor}"
                );
            }
        }
    }
    let rotary = Checkpoint::open(format!("{KINDS}/rotary.safetensors"));
    let angles = rotary_angles(16, 16.0, 8, 10000.0);
    let cos: Vec<f64> = angles.iter().map(|a| a.cos()).collect();
    let sin: Vec<f64> = angles.iter().map(|a| a.sin()).collect();
    assert!(largest_gap(&rotary.floats("rope.freqs_cos"), &cos) <= ROTARY_TOL);
    assert!(largest_gap(&rotary.floats("rope.freqs_sin"), &sin) <= ROTARY_TOL);
}

#[test]
fn rebuilt_index_buffers_follow_the_window_relative_construction() {
    let m = manifest();
    let mut checked = 0;
    for name in keys(&m["cases"]) {
        let c = &m["cases"][&name];
        let rebuilt = c["rebuilt"].as_object().unwrap();
        let indexes: Vec<_> = rebuilt
            .iter()
            .filter(|(_, spec)| {
                spec["construction"]
                    .as_str()
                    .unwrap()
                    .starts_with("window-relative index")
            })
            .collect();
        if indexes.is_empty() {
            continue;
        }
        let out = resize_case(&name, &[]).output();
        for (tensor, spec) in indexes {
            let construction = spec["construction"].as_str().unwrap();
            let (wh, ww) = sides_in(construction);
            let class = construction.contains("class row");
            let got = out.ints(tensor);
            let want = window_index(wh, ww, class);
            assert_eq!(got.len(), want.len(), "{name}/{tensor}: {construction}");
            let first_wrong = got.iter().zip(&want).position(|(g, w)| g != w);
            assert_eq!(first_wrong, None, "{name}/{tensor}: {construction}");
            if class {
                // The class entries as the manifest spells them out for M = 2212.
                let n = wh * ww + 1;
                let m_rows = ((2 * wh - 1) * (2 * ww - 1) + 3) as i64;
                assert_eq!(m_rows, 2212, "{name}/{tensor}: {construction}");
                assert_eq!(
                    (got[1], got[n], got[0]),
                    (m_rows - 3, m_rows - 2, m_rows - 1)
                );
            }
            checked += 1;
        }
    }
    assert_eq!(checked, 7, "index buffers rebuilt across the manifest");
}

#[test]
fn rebuilt_mask_follows_the_shifted_window_construction() {
    let c = case("window_stages");
    let tensor = "layers.0.blocks.1.attn_mask";
    let construction = c["rebuilt"][tensor]["construction"].as_str().unwrap();
    assert_eq!(
        construction,
        "shifted-window mask, feature map 24x24, window 12, shift 6"
    );
    let (map_h, map_w) = sides_in(construction);
    let (window, shift) = (
        number_after(construction, ", window"),
        number_after(construction, ", shift"),
    );
    let r = resize_case("window_stages", &[]);
    let out = r.output();
    assert_eq!(out.shape(tensor), [4, 144, 144]);
    assert_eq!(out.dtype(tensor), Dtype::F32);
    let want: Vec<f64> = shift_mask(map_h, map_w, window, shift)
        .into_iter()
        .map(f64::from)
        .collect();
    let got = out.floats(tensor);
    let first_wrong = got.iter().zip(&want).position(|(g, w)| g != w);
    assert_eq!(first_wrong, None, "{tensor}: {construction}");
    let prov = out.provenance();
    let entry = prov["tables"]
        .as_array()
        .unwrap()
        .iter()
        .find(|t| t["masks_rebuilt"].as_array().is_some_and(|m| !m.is_empty()))
        .expect("a table whose mask was rebuilt");
    assert_eq!(entry["masks_rebuilt"], json!([tensor]));
    // Stage 1 (7x7 -> 12x12 map, window 12) had and has no mask (manifest notes).
    assert!(!out
        .names()
        .iter()
        .any(|n| n.starts_with("layers.1") && n.ends_with("attn_mask")));
}

#[test]
fn rotary_buffers_are_rebuilt_by_the_construction() {
    let c = case("rotary");
    let r = resize_case("rotary", &[]);
    let out = r.output();
    for (tensor, f) in [
        ("rope.freqs_cos", f64::cos as fn(f64) -> f64),
        ("rope.freqs_sin", f64::sin),
    ] {
        let k = &c["expected_tensors"][tensor]["construction"];
        let grid = k["grid"].as_u64().unwrap() as usize;
        let side = k["pretrain_side"].as_f64().unwrap();
        let width = k["axis_width"].as_u64().unwrap() as usize;
        let theta = k["theta"].as_f64().unwrap();
        assert_eq!((grid, side, width, theta), (24, 16.0, 8, 10000.0));
        let want: Vec<f64> = rotary_angles(grid, side, width, theta)
            .into_iter()
            .map(f)
            .collect();
        assert_eq!(out.shape(tensor), [grid * grid, 2 * width], "{tensor}");
        let gap = largest_gap(&out.floats(tensor), &want);
        assert!(
            gap <= ROTARY_TOL,
            "{tensor}: off by {gap:.3e} from the 2-D rotary construction"
        );
    }
}

/// A one-stage shifted-window model (patch 4, 14x14 map, window 7, 2 heads), built here.
fn one_stage_model(dir: &Path) -> PathBuf {
    let heads = 2;
    let table = |seed| common::noise(169 * heads, seed, 0.5);
    let tensors = vec![
        common::floats(
            "patch_embed.proj.weight",
            Dtype::F32,
            &[8, 3, 4, 4],
            &common::noise(384, 1, 0.1),
        ),
        common::floats(
            "layers.0.blocks.0.attn.relative_position_bias_table",
            Dtype::F32,
            &[169, heads],
            &table(2),
        ),
        write_i64(
            "layers.0.blocks.0.attn.relative_position_index",
            &[49, 49],
            &window_index(7, 7, false),
        ),
        common::floats(
            "layers.0.blocks.1.attn.relative_position_bias_table",
            Dtype::F32,
            &[169, heads],
            &table(3),
        ),
        write_i64(
            "layers.0.blocks.1.attn.relative_position_index",
            &[49, 49],
            &window_index(7, 7, false),
        ),
        common::floats(
            "layers.0.blocks.1.attn_mask",
            Dtype::F32,
            &[4, 49, 49],
            &shift_mask(14, 14, 7, 3)
                .into_iter()
                .map(f64::from)
                .collect::<Vec<_>>(),
        ),
        common::floats("norm.weight", Dtype::F32, &[8], &common::noise(8, 4, 1.0)),
    ];
    common::write(dir, "one-stage.safetensors", &tensors, None)
}

#[test]
fn a_stage_whose_new_map_equals_the_window_loses_its_mask() {
    // 14x14 map at patch 4 -> 96 px: a 24x24 map; window 24 covers it, so no shift, no mask
    // (README: masks are "left out where the window now covers the map").
    let src = tempfile::tempdir().unwrap();
    let input = one_stage_model(src.path());
    let r = resize(s(&input), &["--image", "96", "--window", "24"]);
    assert_eq!(code(&r.run), 0, "{}", stderr(&r.run));
    let mask = "layers.0.blocks.1.attn_mask";
    assert_eq!(r.report["dropped"], json!([mask]), "the report's dropped");
    let out = r.output();
    assert!(
        !out.names().contains(mask),
        "the mask is still in the output"
    );
    let mut left = Checkpoint::open(&input).names();
    left.remove(mask);
    assert_eq!(out.names(), left);
    for block in ["0", "1"] {
        let tensor = format!("layers.0.blocks.{block}.attn.relative_position_index");
        assert_eq!(out.ints(&tensor), window_index(24, 24, false), "{tensor}");
    }
    let prov = out.provenance();
    let dropped: Vec<&Value> = prov["tables"]
        .as_array()
        .unwrap()
        .iter()
        .flat_map(|t| t["masks_dropped"].as_array().unwrap())
        .collect();
    assert_eq!(dropped, [mask], "provenance masks_dropped");
}

// ---------------------------------------------------------------------------------------------
// 3. scan --json: kinds and their fields (README kinds table).

/// `got` holds everything `want` says: the same scalars, arrays of the same length, and objects
/// with at least `want`'s keys (fields the README leaves open may be there too).
fn holds(got: &Value, want: &Value) -> bool {
    match (got, want) {
        (Value::Object(g), Value::Object(w)) => {
            w.iter().all(|(k, v)| g.get(k).is_some_and(|x| holds(x, v)))
        }
        (Value::Array(g), Value::Array(w)) => {
            g.len() == w.len() && g.iter().zip(w).all(|(x, v)| holds(x, v))
        }
        _ => got == want,
    }
}

/// scan --json on a case's input: `tables` lists exactly the `want` entries, each holding its
/// fields; every grid-dependent tensor of the case (expected or rebuilt in the manifest) is
/// covered by an entry of its kind (as its name, index, mask, sine half or companion); no
/// untouched tensor is listed. Returns the exit code (checked by the callers).
fn check_scan(case_name: &str, args: &[&str], want: &[(String, Value)]) -> i32 {
    let c = case(case_name);
    let (run, report) = scan(&input_of(&c), args);
    assert!(report.is_object(), "{case_name}: no JSON: {}", stderr(&run));
    assert_eq!(report["ambiguous"], json!([]), "{case_name}");
    let tables = report["tables"].as_array().unwrap();
    let by_name: BTreeMap<&str, &Value> = tables
        .iter()
        .map(|t| (t["name"].as_str().unwrap(), t))
        .collect();
    assert_eq!(
        by_name.len(),
        tables.len(),
        "{case_name}: a tensor listed twice"
    );
    for (name, fields) in want {
        let entry = by_name
            .get(name.as_str())
            .unwrap_or_else(|| panic!("{case_name}: scan does not list {name}"));
        assert!(
            holds(entry, fields),
            "{case_name}/{name}: want {fields}, scan says {entry}"
        );
    }
    let listed: Vec<&str> = by_name.keys().copied().collect();
    assert_eq!(listed.len(), want.len(), "{case_name}: {listed:?}");
    let mut grid_dependent = keys(&c["expected_tensors"]);
    grid_dependent.extend(keys(&c["rebuilt"]));
    for tensor in &grid_dependent {
        let names_it = |v: &Value| v == tensor.as_str();
        let in_list = |v: &Value, field: Option<&str>| {
            v.as_array()
                .is_some_and(|l| l.iter().any(|x| names_it(field.map_or(x, |f| &x[f]))))
        };
        let covering = tables.iter().find(|t| {
            names_it(&t["name"])
                || names_it(&t["index"])
                || names_it(&t["sin"])
                || in_list(&t["masks"], Some("name"))
                || in_list(&t["companions"], None)
        });
        let entry = covering.unwrap_or_else(|| panic!("{case_name}: scan misses {tensor}"));
        assert_eq!(entry["kind"], kind_of(tensor), "{case_name}/{tensor}: kind");
    }
    for tensor in keys(&c["untouched"]) {
        assert!(
            !by_name.contains_key(tensor.as_str()),
            "{case_name}: {tensor} listed"
        );
    }
    code(&run)
}

/// What scan must say of the window-relative fixtures, per case.
fn window_scans() -> Vec<(&'static str, Vec<(String, Value)>)> {
    // Swin-style stages: the window (7) read from the index buffers, follows --window; the
    // shifted block of stage 0 carries its 14x14 map's mask, shift 7 / 2 = 3.
    let mut stages = Vec::new();
    for (stage, heads) in [(0, 3), (1, 6)] {
        for block in 0..2 {
            let name = format!("layers.{stage}.blocks.{block}.attn.relative_position_bias_table");
            let masks = if (stage, block) == (0, 1) {
                json!([{"name": "layers.0.blocks.1.attn_mask", "map": [14, 14], "shift": [3, 3]}])
            } else {
                json!([])
            };
            let fields = json!({
                "kind": "window_relative", "window": [7, 7], "heads": heads,
                "class_rows": false, "follows": "window",
                "index": name.replace("relative_position_bias_table", "relative_position_index"),
                "masks": masks,
            });
            stages.push((name, fields));
        }
    }
    // BEiT-style: three class rows; the window is the whole 8x8 grid and follows --grid.
    let beit = |name: &str| {
        let index = name.replace("relative_position_bias_table", "relative_position_index");
        let fields = json!({"kind": "window_relative", "window": [8, 8], "heads": 4,
                            "class_rows": true, "follows": "grid", "index": index});
        (name.to_string(), fields)
    };
    vec![
        ("window_stages", stages),
        (
            "window_class_rows",
            vec![beit("rel_pos_bias.relative_position_bias_table")],
        ),
        (
            "window_class_rows_blocks",
            vec![
                beit("blocks.0.attn.relative_position_bias_table"),
                beit("blocks.1.attn.relative_position_bias_table"),
            ],
        ),
    ]
}

#[test]
fn scan_lists_window_relative_tables_with_their_windows() {
    for (name, want) in window_scans() {
        check_scan(name, &[], &want);
    }
}

#[test]
fn scan_of_window_relative_tables_alone_exits_0() {
    // README Exit codes: 0 for success; 4 is for no table or an ambiguous one, and scan finds
    // and lists 1 to 4 tables here, none ambiguous, with nothing on stderr.
    for (name, want) in window_scans() {
        assert_eq!(check_scan(name, &[], &want), 0, "scan {name}");
    }
}

#[test]
fn scan_lists_axial_rotary_and_temporal_tables() {
    // Per-axis tables: S = the grid side (64) for global blocks, the window (14) otherwise.
    let absolute =
        |grid: Value, slots: usize| json!({"kind": "learned", "grid": grid, "slots": slots});
    let mut axial = vec![("pos_embed".to_string(), absolute(json!([64, 64]), 0))];
    for block in 0..4 {
        let (span, follows) = if block % 2 == 0 {
            (14, "window")
        } else {
            (64, "grid")
        };
        for (suffix, axis) in [("h", "height"), ("w", "width")] {
            let fields = json!({"kind": "axial_relative", "axis": axis, "span": span,
                                "follows": follows});
            axial.push((format!("blocks.{block}.attn.rel_pos_{suffix}"), fields));
        }
    }
    assert_eq!(
        check_scan("axial", &[], &axial),
        0,
        "README: exit 0, tables found"
    );
    // Rotary: θ, L and d read back from the values (the manifest's construction parameters).
    let rotary = json!({"kind": "rotary", "grid": [16, 16], "theta": 10000.0,
                        "pretrain_side": 16.0, "axis_dim": 8, "sin": "rope.freqs_sin"});
    let found = check_scan(
        "rotary",
        &[],
        &[
            ("pos_embed".into(), absolute(json!([16, 16]), 1)),
            ("rope.freqs_cos".into(), rotary),
        ],
    );
    assert_eq!(found, 0, "rotary");
    let found = check_scan(
        "video_temporal",
        &[],
        &[
            ("pos_embed".into(), absolute(json!([14, 14]), 1)),
            (
                "time_embed".into(),
                json!({"kind": "temporal", "frames": 8}),
            ),
        ],
    );
    assert_eq!(found, 0, "video_temporal");
    let mut video = absolute(json!([14, 14]), 0);
    video["frames"] = json!(8);
    let found = check_scan(
        "video",
        &["--source-grid", "8x14x14"],
        &[("pos_embed".into(), video)],
    );
    assert_eq!(found, 0, "video with --source-grid");
}

#[test]
fn scan_names_a_fixed_sine_cosine_table_sincos() {
    // The 2-D sine-cosine construction of tests/common (common practice) on a 14x14 grid.
    let dir = tempfile::tempdir().unwrap();
    let d = 32;
    let path = common::write(
        dir.path(),
        "sincos.safetensors",
        &[
            common::floats(
                "pos_embed",
                Dtype::F32,
                &[1, 197, d],
                &common::sincos_table(1, 14, 14, d),
            ),
            common::floats(
                "patch_embed.proj.weight",
                Dtype::F32,
                &[d, 3, 16, 16],
                &common::noise(d * 768, 5, 0.1),
            ),
        ],
        None,
    );
    let (run, report) = scan(s(&path), &[]);
    assert_eq!(code(&run), 0, "{}", stderr(&run));
    assert_eq!(report["tables"][0]["name"], "pos_embed");
    assert_eq!(report["tables"][0]["kind"], "sincos");
}

#[test]
fn a_video_grid_without_its_source_grid_is_ambiguous() {
    let input = input_of(&case("video"));
    let (run, report) = scan(&input, &[]);
    assert_eq!(
        code(&run),
        AMBIGUOUS,
        "scan: README exit 4 for an ambiguous table"
    );
    let ambiguous = report["ambiguous"].as_array().unwrap();
    assert_eq!(ambiguous.len(), 1);
    assert_eq!(ambiguous[0]["name"], "pos_embed");
    assert_eq!(ambiguous[0]["resolve_with"], "--source-grid TxHxW");
    let candidates = ambiguous[0]["candidates"].as_array().unwrap();
    assert!(
        candidates.contains(&json!([0, [8, 14, 14]])),
        "{candidates:?}"
    );
    // resize, with a video target given two ways, refuses and writes nothing.
    for target in [
        &["--grid", "8x16x16"][..],
        &["--image", "256", "--frames", "8"],
    ] {
        let r = resize(&input, target);
        assert_eq!(code(&r.run), AMBIGUOUS, "{target:?}: {}", stderr(&r.run));
        assert!(
            stderr(&r.run).contains("--source-grid TxHxW"),
            "{target:?}: {}",
            stderr(&r.run)
        );
        assert!(
            entries(r.dir.path()).is_empty(),
            "{target:?} wrote something"
        );
    }
}

// ---------------------------------------------------------------------------------------------
// 4. Options and refusals.

#[test]
fn geometric_method_keeps_class_rows_and_matches_scipy() {
    let tensor = "rel_pos_bias.relative_position_bias_table";
    let r = resize_case("window_class_rows", &["--relative", "geometric"]);
    assert_eq!(r.report["tables"][0]["method"], "geometric");
    let out = r.output();
    let input = Checkpoint::open(input_of(&case("window_class_rows")));
    let (got, was) = (out.raw(tensor), input.raw(tensor));
    let class_bytes = 3 * 4 * 4;
    assert_eq!(
        got[got.len() - class_bytes..],
        was[was.len() - class_bytes..],
        "class rows"
    );
    // Different from the kernel method (the torch bicubic reference of the manifest).
    let kernel = Checkpoint::open(format!("{KINDS}/window_class_rows.expected.safetensors"));
    let apart = largest_gap(&out.floats(tensor), &kernel.floats(tensor));
    assert!(apart > 1e-2, "geometric and bicubic agree to {apart:.2e}");
    // scipy RectBivariateSpline(s = 0) at the geometric coordinates, class rows appended.
    let golden = Checkpoint::open("fixtures/golden/geometric_window_class_rows.safetensors");
    let want = golden.floats("table");
    let gap = largest_gap(&out.floats(tensor), &want);
    let bound = RELATIVE_TOL * largest(&want);
    assert!(
        gap <= bound,
        "off by {gap:.3e} (bound {bound:.3e}) from scipy's spline"
    );
    let index = "rel_pos_bias.relative_position_index";
    assert_eq!(out.ints(index), window_index(24, 24, true), "{index}");
}

#[test]
fn dry_run_writes_nothing() {
    for name in ["window_stages", "rotary", "axial", "video"] {
        let r = resize_case(name, &["--dry-run"]);
        assert_eq!(r.report["dry_run"], true, "{name}");
        assert!(
            !r.report["tables"].as_array().unwrap().is_empty(),
            "{name}: a plan"
        );
        assert!(
            entries(r.dir.path()).is_empty(),
            "{name}: --dry-run wrote something"
        );
    }
}

#[test]
fn tensor_restricts_the_change_to_one_table() {
    let chosen = "layers.0.blocks.1.attn.relative_position_bias_table";
    let r = resize_case("window_stages", &["--tensor", chosen]);
    let listed: Vec<&Value> = r.report["tables"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| &t["name"])
        .collect();
    assert_eq!(listed, [chosen]);
    let follows = [
        chosen,
        "layers.0.blocks.1.attn.relative_position_index",
        "layers.0.blocks.1.attn_mask",
    ];
    let input = Checkpoint::open(input_of(&case("window_stages")));
    let out = r.output();
    for tensor in input.names() {
        let same = out.raw(&tensor) == input.raw(&tensor);
        assert_eq!(
            !same,
            follows.contains(&tensor.as_str()),
            "{tensor} changed: {}",
            !same
        );
    }
    // The one table still matches torch (the manifest's call for it).
    let expected = Checkpoint::open(format!("{KINDS}/window_stages.expected.safetensors"));
    let want = expected.floats(chosen);
    assert!(largest_gap(&out.floats(chosen), &want) <= RELATIVE_TOL * largest(&want));

    let r = resize_case("video_temporal", &["--tensor", "time_embed"]);
    let listed: Vec<&Value> = r.report["tables"]
        .as_array()
        .unwrap()
        .iter()
        .map(|t| &t["name"])
        .collect();
    assert_eq!(listed, ["time_embed"]);
    let out = r.output();
    let input = Checkpoint::open(input_of(&case("video_temporal")));
    assert!(
        out.raw("pos_embed") == input.raw("pos_embed"),
        "pos_embed changed"
    );
    assert_eq!(out.shape("time_embed"), [1, 16, 24]);
}

#[test]
fn tensor_restricts_the_change_to_a_global_per_axis_table() {
    // README kinds table: a per-axis table whose S is the patch grid side follows --grid;
    // --tensor only restricts which tables change. Without --tensor, blocks.1's table goes
    // 127 -> 191 rows (manifest case axial); with it, the same must happen.
    let chosen = "blocks.1.attn.rel_pos_h";
    let (run, report) = scan(&input_of(&case("axial")), &["--tensor", chosen]);
    assert_eq!(code(&run), 0);
    let entries: Vec<&Value> = report["tables"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|t| t["name"] == chosen)
        .collect();
    assert_eq!(
        entries.len(),
        1,
        "scan --tensor lists {chosen} {} times",
        entries.len()
    );
    assert_eq!(entries[0]["kind"], "axial_relative");
    assert_eq!(entries[0]["follows"], "grid");
    for extra in [&[][..], &["--window", "21"]] {
        let mut args = vec!["--grid", "96", "--tensor", chosen];
        args.extend_from_slice(extra);
        let r = resize(&input_of(&case("axial")), &args);
        assert_eq!(code(&r.run), 0, "{args:?}: {}", stderr(&r.run));
        assert_eq!(r.report["nothing_to_do"], false, "{args:?}");
        let out = r.output();
        assert_eq!(out.shape(chosen), [191, 4], "{args:?}");
        let expected = Checkpoint::open(format!("{KINDS}/axial.expected.safetensors"));
        let want = expected.floats(chosen);
        assert!(largest_gap(&out.floats(chosen), &want) <= RELATIVE_TOL * largest(&want));
    }
}

#[test]
fn a_window_that_does_not_divide_the_new_map_is_a_usage_error() {
    let input = input_of(&case("window_stages"));
    for window in ["10", "16"] {
        let r = resize(&input, &["--image", "96", "--window", window]);
        assert_eq!(code(&r.run), USAGE, "--window {window}: {}", stderr(&r.run));
        assert!(
            stderr(&r.run).contains("layers.0.blocks.1.attn_mask"),
            "{}",
            stderr(&r.run)
        );
        assert!(
            entries(r.dir.path()).is_empty(),
            "--window {window} wrote something"
        );
    }
}

#[test]
fn a_non_square_grid_with_rotary_buffers_is_a_usage_error() {
    let r = resize(&input_of(&case("rotary")), &["--grid", "24x32"]);
    assert_eq!(code(&r.run), USAGE, "{}", stderr(&r.run));
    let message = stderr(&r.run);
    assert!(
        message.contains("rope.freqs_cos") && message.contains("square"),
        "{message}"
    );
    assert!(entries(r.dir.path()).is_empty());
}

#[test]
fn frames_beside_a_time_axis_in_the_grid_is_refused_and_counts_input_frames() {
    let video = input_of(&case("video"));
    let temporal = input_of(&case("video_temporal"));
    let refused: [(&str, &[&str]); 2] = [
        (
            &video,
            &[
                "--source-grid",
                "8x14x14",
                "--grid",
                "8x16x16",
                "--frames",
                "4",
            ],
        ),
        (&temporal, &["--grid", "8x16x16", "--frames", "16"]),
    ];
    for (input, args) in refused {
        let r = resize(input, args);
        assert_eq!(code(&r.run), USAGE, "{args:?}: {}", stderr(&r.run));
        assert!(stderr(&r.run).contains("--frames"), "{}", stderr(&r.run));
        assert!(entries(r.dir.path()).is_empty());
    }
    // --grid TxHxW gives the time axis itself: --frames (input frames) beside it is refused
    // even when it would agree.
    let r = resize(
        &video,
        &[
            "--source-grid",
            "8x14x14",
            "--grid",
            "8x16x16",
            "--frames",
            "16",
        ],
    );
    assert_eq!(code(&r.run), USAGE, "{}", stderr(&r.run));
    // --frames counts input frames: 16 frames of 2-frame tubelets are 8 positions along time
    // (the 5-D kernel's t = 2), so this is the 8x16x16 case.
    let r = resize(
        &video,
        &[
            "--source-grid",
            "8x14x14",
            "--image",
            "256",
            "--frames",
            "16",
        ],
    );
    assert_eq!(code(&r.run), 0, "{}", stderr(&r.run));
    assert_eq!(r.report["tables"][0]["to"], serde_json::json!([8, 16, 16]));
}

#[test]
fn provenance_records_every_changed_tensor_with_its_kind() {
    let m = manifest();
    for name in keys(&m["cases"]) {
        let c = &m["cases"][&name];
        let r = resize_case(&name, &[]);
        let out = r.output();
        let input = Checkpoint::open(input_of(c));
        // The input's own metadata is kept beside the record (README).
        let mut meta = out.metadata();
        meta.remove("posgrid");
        assert_eq!(meta, input.metadata(), "{name}: metadata");
        let prov = out.provenance();
        let tables = prov["tables"].as_array().unwrap();
        for tensor in keys(&c["expected_tensors"]) {
            let kind = kind_of(&tensor);
            let entry = tables.iter().find(|t| {
                t["name"] == tensor.as_str()
                    || t["companions"]
                        .as_array()
                        .is_some_and(|l| l.iter().any(|n| n == tensor.as_str()))
            });
            let entry = entry.unwrap_or_else(|| panic!("{name}: provenance misses {tensor}"));
            assert_eq!(entry["kind"], kind, "{name}/{tensor}: provenance kind");
            assert_eq!(entry["method"], method_of(kind), "{name}/{tensor}: method");
        }
        let companions = strings(&prov["companions"]);
        for tensor in keys(&c["rebuilt"]) {
            assert!(
                companions.contains(&tensor),
                "{name}: provenance misses {tensor}"
            );
        }
    }
}
