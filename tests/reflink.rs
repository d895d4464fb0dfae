//! On a file system that shares extents between files (XFS with reflink), a resized checkpoint
//! shares its untouched blocks with the input instead of copying them: at least 99% of the
//! output's bytes lie in blocks of the input, and everything but the resized tables reads back
//! byte for byte as in the input.
//!
//! These tests make a small XFS image with reflink on and loop-mount it. That needs root,
//! `mkfs.xfs` (Debian's xfsprogs) and a loop device; where any is missing each test says why on
//! stderr and passes without checking anything. Sharing is read from `xfs_io`'s extent map
//! (xfsprogs: an outside view of what the kernel did), compared by physical block with the
//! input's extents; safetensors bytes are compared through the reference `safetensors` crate.

mod common;

use std::io::Write as _;
use std::path::{Path, PathBuf};
use std::process::Command;

use common::{floats, noise, posgrid, s, smooth_table, stderr, T};
use posgrid::checkpoint::writer::{self, Destination, OutEntry, Output};
use posgrid::checkpoint::{Format, Source, TensorSource};
use safetensors::tensor::Dtype;
use safetensors::SafeTensors;

/// Sparse image size: mkfs.xfs refuses file systems under 300 MiB.
const IMAGE_BYTES: u64 = 512 << 20;
/// Width of the model: rows of 384 bytes, so a table's size changes by a fraction of a block.
const D: usize = 96;
/// The share of the output that must lie in the input's blocks.
const LEAST_SHARED: f64 = 0.99;

/// A loop-mounted XFS image with reflink on, unmounted (and its loop device freed) on drop.
struct Xfs {
    mount: PathBuf,
    _host: tempfile::TempDir,
}

impl Drop for Xfs {
    fn drop(&mut self) {
        let umount = program("umount").unwrap_or_else(|| PathBuf::from("umount"));
        let done = Command::new(&umount).arg(&self.mount).status();
        if !done.is_ok_and(|s| s.success()) {
            // Still busy: detach it now, the kernel frees it when the last user is gone.
            let _ = Command::new(&umount).arg("-l").arg(&self.mount).status();
        }
    }
}

/// Say on stderr (past the test harness's capture) why a test checks nothing here.
fn skip(why: &str) -> Option<Xfs> {
    let _ = writeln!(
        std::io::stderr(),
        "reflink test skipped: {why} (needs root, mkfs.xfs from xfsprogs and a loop device)"
    );
    None
}

/// A program on PATH or in the usual system folders.
fn program(name: &str) -> Option<PathBuf> {
    let path = std::env::var_os("PATH").unwrap_or_default();
    std::env::split_paths(&path)
        .chain(["/usr/sbin", "/sbin", "/usr/bin", "/bin"].map(PathBuf::from))
        .map(|d| d.join(name))
        .find(|p| p.is_file())
}

fn run(cmd: &mut Command) -> Result<(), String> {
    match cmd.output() {
        Ok(o) if o.status.success() => Ok(()),
        Ok(o) => Err(String::from_utf8_lossy(&o.stderr).trim().to_string()),
        Err(e) => Err(e.to_string()),
    }
}

/// Make and mount the image, or say why not.
fn xfs() -> Option<Xfs> {
    // SAFETY: a plain query of the process's user.
    if unsafe { libc::geteuid() } != 0 {
        return skip("not running as root");
    }
    let (Some(mkfs), Some(mount)) = (program("mkfs.xfs"), program("mount")) else {
        return skip("mkfs.xfs or mount is not installed");
    };
    if program("umount").is_none() {
        return skip("umount is not installed");
    }
    if program("xfs_io").is_none() {
        return skip("xfs_io is not installed");
    }
    let host = tempfile::tempdir().unwrap();
    let image = host.path().join("xfs.img");
    std::fs::File::create(&image)
        .and_then(|f| f.set_len(IMAGE_BYTES))
        .unwrap();
    let mnt = host.path().join("mnt");
    std::fs::create_dir(&mnt).unwrap();
    if let Err(e) = run(Command::new(mkfs)
        .args(["-q", "-m", "reflink=1"])
        .arg(&image))
    {
        return skip(&format!("mkfs.xfs -m reflink=1 failed: {e}"));
    }
    if let Err(e) = run(Command::new(mount)
        .args(["-o", "loop"])
        .arg(&image)
        .arg(&mnt))
    {
        return skip(&format!("the image could not be loop-mounted: {e}"));
    }
    Some(Xfs {
        mount: mnt,
        _host: host,
    })
}

/// One extent of a file, in bytes: where it is in the file and on the device, and whether
/// the file system marks it shared.
#[derive(Debug)]
struct Extent {
    logical: u64,
    physical: u64,
    len: u64,
    shared: bool,
}

/// The extent map `xfs_io -r -c "fiemap -v"` prints (units of 512 bytes; holes left out):
/// `   1: [4688..2380655]: 1832..2377799    2375968 0x2001`.
fn extents(path: &Path) -> Vec<Extent> {
    let o = Command::new(program("xfs_io").unwrap())
        .args(["-r", "-c", "fiemap -v"])
        .arg(path)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let range = |t: &str| -> Option<(u64, u64)> {
        let (a, b) = t
            .trim_matches(|c| c == '[' || c == ']' || c == ':')
            .split_once("..")?;
        Some((a.parse().ok()?, b.parse().ok()?))
    };
    String::from_utf8_lossy(&o.stdout)
        .lines()
        .filter_map(|line| {
            let f: Vec<&str> = line.split_whitespace().collect();
            let (l0, l1) = range(f.get(1)?)?;
            let (p0, _) = range(f.get(2)?)?;
            let flags = u32::from_str_radix(f.get(4)?.trim_start_matches("0x"), 16).ok()?;
            Some(Extent {
                logical: l0 * 512,
                physical: p0 * 512,
                len: (l1 - l0 + 1) * 512,
                shared: flags & 0x2000 != 0,
            })
        })
        .collect()
}

/// Bytes of `output` (within its size) that lie in shared blocks also mapped by one of
/// `inputs`.
fn bytes_in_input_blocks(output: &Path, inputs: &[PathBuf]) -> u64 {
    let size = std::fs::metadata(output).unwrap().len();
    let theirs: Vec<Extent> = inputs.iter().flat_map(|p| extents(p)).collect();
    extents(output)
        .iter()
        .filter(|e| e.shared)
        .map(|e| {
            let end = (e.logical + e.len).min(size);
            let len = end.saturating_sub(e.logical);
            let (a, b) = (e.physical, e.physical + len);
            theirs
                .iter()
                .map(|t| b.min(t.physical + t.len).saturating_sub(a.max(t.physical)))
                .sum::<u64>()
        })
        .sum()
}

/// The files of an output: the file itself, or the files of a directory.
fn files(path: &Path) -> Vec<PathBuf> {
    if path.is_dir() {
        let mut v: Vec<PathBuf> = std::fs::read_dir(path)
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        v.sort();
        v
    } else {
        vec![path.to_path_buf()]
    }
}

/// Resize `input` to a 16x16 grid (durable, the default), check that at least 99% of the
/// output lies in the input's blocks and that the report's `bytes_shared` says so too.
fn resize_and_check_sharing(input: &Path, output: &Path, extra: &[&str]) {
    let mut args = vec![
        "resize",
        s(input),
        "-o",
        s(output),
        "--grid",
        "16",
        "--json",
    ];
    args.extend(extra);
    let o = posgrid(&args);
    assert!(o.status.success(), "{}", stderr(&o));
    let report: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let outputs = files(output);
    let size: u64 = outputs
        .iter()
        .map(|p| std::fs::metadata(p).unwrap().len())
        .sum();
    let inputs = files(input);
    let shared: u64 = outputs
        .iter()
        .map(|p| bytes_in_input_blocks(p, &inputs))
        .sum();
    let fraction = shared as f64 / size as f64;
    eprintln!(
        "{}: {shared} of {size} bytes ({:.2}%) in the input's blocks",
        output.display(),
        100.0 * fraction
    );
    assert!(
        fraction >= LEAST_SHARED,
        "{}: only {shared} of {size} bytes ({:.2}%) lie in the input's blocks",
        output.display(),
        100.0 * fraction
    );
    // The report reads the same extent map: it counts what xfs_io sees, within a block per
    // file (the last partial block is counted to the file's end).
    let reported = report["bytes_shared"].as_u64().unwrap();
    assert!(
        reported + 4096 * outputs.len() as u64 >= shared && reported <= size,
        "reported {reported}, xfs_io {shared}"
    );
    assert_eq!(
        reported + report["bytes_copied"].as_u64().unwrap(),
        report["output_size"].as_u64().unwrap()
    );
}

/// A vision transformer in the framework's naming: the position table sits in the middle of
/// the data area (after the patch embedding, before the encoder), 1 class slot, a 14x14 grid.
fn checkpoint(dir: &Path, file: &str) -> PathBuf {
    let mut tensors: Vec<T> = vec![
        floats(
            "vit.embeddings.cls_token",
            Dtype::F32,
            &[1, 1, D],
            &noise(D, 1, 0.02),
        ),
        floats(
            "vit.embeddings.patch_embeddings.projection.weight",
            Dtype::F32,
            &[D, 3, 8, 8],
            &noise(D * 3 * 64, 2, 0.02),
        ),
        floats(
            "vit.embeddings.patch_embeddings.projection.bias",
            Dtype::F32,
            &[D],
            &noise(D, 3, 0.02),
        ),
        floats(
            "vit.embeddings.position_embeddings",
            Dtype::F32,
            &[1, 197, D],
            &smooth_table(1, 14, 14, D, 4),
        ),
    ];
    for layer in 0..10 {
        let name = |n: &str| format!("vit.encoder.layer.{layer:02}.{n}");
        tensors.push(floats(
            &name("mlp.weight"),
            Dtype::F32,
            &[D, 120 * D],
            &noise(120 * D * D, 10 + layer as u64, 0.02),
        ));
        tensors.push(floats(
            &name("norm.bias"),
            Dtype::F32,
            &[D + 1],
            &noise(D + 1, 40 + layer as u64, 0.02),
        ));
    }
    common::write(dir, file, &tensors, None)
}

/// The reference reader's view of a safetensors file: every tensor's dtype, shape and bytes.
fn tensors_of(bytes: &[u8]) -> Vec<(String, Dtype, Vec<usize>, Vec<u8>)> {
    let st = SafeTensors::deserialize(bytes).unwrap();
    let mut v: Vec<_> = st
        .tensors()
        .into_iter()
        .map(|(n, t)| (n, t.dtype(), t.shape().to_vec(), t.data().to_vec()))
        .collect();
    v.sort_by(|a, b| a.0.cmp(&b.0));
    v
}

/// Every tensor but the table reads back as in the input; the table has its new shape.
fn check_safetensors_bytes(input: &Path, output: &Path, table: &str) {
    let before = tensors_of(&std::fs::read(input).unwrap());
    let after = tensors_of(&std::fs::read(output).unwrap());
    assert_eq!(before.len(), after.len());
    for (b, a) in before.iter().zip(&after) {
        assert_eq!(a.0, b.0);
        if a.0 == table {
            assert_eq!(a.2, [1, 257, D], "the table's new shape");
        } else {
            assert!(a.1 == b.1 && a.2 == b.2 && a.3 == b.3, "{} differs", a.0);
        }
    }
}

#[test]
fn a_resized_safetensors_file_shares_its_untouched_blocks_with_the_input() {
    let Some(fs) = xfs() else { return };
    let input = checkpoint(&fs.mount, "vit.safetensors");
    let output = fs.mount.join("vit-16.safetensors");
    resize_and_check_sharing(&input, &output, &[]);
    check_safetensors_bytes(&input, &output, "vit.embeddings.position_embeddings");
    // --no-sync changes only when the data reaches the disk.
    let scratch = fs.mount.join("vit-16-scratch.safetensors");
    resize_and_check_sharing(&input, &scratch, &["--no-sync"]);
    assert_eq!(
        std::fs::read(&output).unwrap(),
        std::fs::read(&scratch).unwrap()
    );
}

#[test]
fn a_set_clones_its_untouched_shards_and_files_whole() {
    let Some(fs) = xfs() else { return };
    let set = fs.mount.join("set");
    std::fs::create_dir(&set).unwrap();
    let whole = checkpoint(&fs.mount, "whole.safetensors");
    let bytes = std::fs::read(&whole).unwrap();
    let st = SafeTensors::deserialize(&bytes).unwrap();
    // Shard 1: the embeddings and the first layers; shard 2: the rest, untouched.
    let mut shards: [Vec<T>; 2] = [Vec::new(), Vec::new()];
    let mut index = serde_json::Map::new();
    for (name, view) in st.tensors() {
        let i = usize::from(name.starts_with("vit.encoder.layer.0") && !name.contains(".00."));
        let file = format!("model-0000{}-of-00002.safetensors", i + 1);
        index.insert(name.clone(), file.into());
        shards[i].push(T {
            name,
            dtype: view.dtype(),
            shape: view.shape().to_vec(),
            bytes: view.data().to_vec(),
        });
    }
    for (i, tensors) in shards.iter().enumerate() {
        common::write(
            &set,
            &format!("model-0000{}-of-00002.safetensors", i + 1),
            tensors,
            None,
        );
    }
    let total: usize = shards.iter().flatten().map(|t| t.bytes.len()).sum();
    let json = serde_json::json!({"metadata": {"total_size": total}, "weight_map": index});
    std::fs::write(
        set.join("model.safetensors.index.json"),
        serde_json::to_vec_pretty(&json).unwrap(),
    )
    .unwrap();
    std::fs::write(set.join("README.md"), vec![b'x'; 10_000]).unwrap();
    let out = fs.mount.join("set-16");
    resize_and_check_sharing(&set, &out, &[]);
    for name in ["model-00002-of-00002.safetensors", "README.md"] {
        assert_eq!(
            std::fs::read(set.join(name)).unwrap(),
            std::fs::read(out.join(name)).unwrap()
        );
    }
    check_safetensors_bytes(
        &set.join("model-00001-of-00002.safetensors"),
        &out.join("model-00001-of-00002.safetensors"),
        "vit.embeddings.position_embeddings",
    );
}

#[test]
fn a_model_directory_clones_the_files_beside_the_weights() {
    let Some(fs) = xfs() else { return };
    let dir = fs.mount.join("model");
    std::fs::create_dir(&dir).unwrap();
    let weights = checkpoint(&dir, "model.safetensors");
    std::fs::write(dir.join("notes.txt"), vec![b'n'; 300_000]).unwrap();
    let out = fs.mount.join("model-16");
    resize_and_check_sharing(&dir, &out, &[]);
    assert_eq!(
        std::fs::read(dir.join("notes.txt")).unwrap(),
        std::fs::read(out.join("notes.txt")).unwrap()
    );
    check_safetensors_bytes(
        &weights,
        &out.join("model.safetensors"),
        "vit.embeddings.position_embeddings",
    );
}

/// Write `input`'s tensors unchanged as `format`, through posgrid's own writer.
fn convert(input: &Path, output: &Path, format: Format) {
    let source = Source::open(input).unwrap();
    let entries = source
        .entries()
        .iter()
        .map(|t| OutEntry {
            name: t.name.clone(),
            shape: t.shape.clone(),
            origin: t,
            new: None,
        })
        .collect();
    let out = Output::new(source.reader(), entries, serde_json::json!({}));
    let dest = Destination {
        path: output,
        sync: false,
        force: false,
        like: input,
    };
    let written = writer::for_format(format)
        .write(&out, &dest, &mut posgrid::write::Silent)
        .unwrap();
    posgrid::write::commit_all(vec![written.pending]).unwrap();
}

/// Every tensor of `output` but the table holds the same bytes as in `input` (read through
/// posgrid's readers, which tests/pytorch_files.rs and tests/interop.rs check against the
/// framework and numpy).
fn check_tensor_bytes(input: &Path, output: &Path, table: &str) {
    let (a, b) = (Source::open(input).unwrap(), Source::open(output).unwrap());
    assert_eq!(a.entries().len(), b.entries().len());
    for (x, y) in a.entries().iter().zip(b.entries()) {
        assert_eq!(x.name, y.name);
        if x.name == table {
            assert_eq!(y.shape, [1, 257, D]);
        } else {
            assert_eq!(a.bytes(x).unwrap(), b.bytes(y).unwrap(), "{}", x.name);
        }
    }
}

#[test]
fn pytorch_and_npz_outputs_share_their_untouched_records() {
    let Some(fs) = xfs() else { return };
    let base = checkpoint(&fs.mount, "base.safetensors");
    for (name, format) in [("vit.pth", Format::PyTorch), ("vit.npz", Format::Npz)] {
        let input = fs.mount.join(name);
        convert(&base, &input, format);
        let output = fs.mount.join(format!("16-{name}"));
        resize_and_check_sharing(&input, &output, &[]);
        check_tensor_bytes(&input, &output, "vit.embeddings.position_embeddings");
    }
}
