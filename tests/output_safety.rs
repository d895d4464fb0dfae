//! What posgrid may and may not do to the paths it writes: the figure path checked with OUT
//! before any work, OUT and the figure committed together, the no-replace rule held at the
//! rename itself, `--force` limited to regular files, links and earlier output sets, the
//! output's permission bits, temporaries' names and the removal of stale ones.

mod common;

use std::fs;
use std::os::unix::fs::{symlink, PermissionsExt};
use std::path::{Path, PathBuf};
use std::process::{Command, Output, Stdio};
use std::time::{Duration, Instant};

use common::*;
use posgrid::write::{self, AtomicDir, AtomicFile, OutputRules, Pending};
use safetensors::Dtype;

fn small_vit(dir: &Path, file: &str) -> PathBuf {
    let d = 16;
    write(
        dir,
        file,
        &[
            floats(
                "pos_embed",
                Dtype::F32,
                &[1, 1 + 14 * 14, d],
                &smooth_table(1, 14, 14, d, 3),
            ),
            floats("head.weight", Dtype::F32, &[4, d], &noise(4 * d, 4, 0.1)),
        ],
        None,
    )
}

fn resize<S: AsRef<std::ffi::OsStr>>(input: &Path, out: &Path, extra: &[S]) -> Output {
    let mut args: Vec<std::ffi::OsString> = vec![
        "resize".into(),
        input.into(),
        "-o".into(),
        out.into(),
        "--grid".into(),
        "8".into(),
    ];
    args.extend(extra.iter().map(|a| a.as_ref().to_os_string()));
    posgrid(&args)
}

const PNG_MAGIC: &[u8] = b"\x89PNG";

#[test]
fn figure_path_equal_to_out_is_refused_before_any_work() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let out = dir.path().join("out.safetensors");
    fs::create_dir(dir.path().join("sub")).unwrap();
    for figure in [out.clone(), dir.path().join("sub/../out.safetensors")] {
        let o = resize(
            &input,
            &out,
            &["--map".as_ref(), figure.as_os_str(), "--force".as_ref()],
        );
        assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
        assert!(stderr(&o).contains("-o"), "{}", stderr(&o));
        assert!(!out.exists(), "nothing written");
    }
    // Through a symbolic link to OUT as well.
    fs::write(&out, "earlier output").unwrap();
    let link = dir.path().join("link.png");
    symlink(&out, &link).unwrap();
    let o = resize(
        &input,
        &out,
        &["--map".as_ref(), link.as_os_str(), "--force".as_ref()],
    );
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert_eq!(fs::read(&out).unwrap(), b"earlier output");
}

#[test]
fn figure_path_equal_to_the_input_is_refused_and_nothing_is_written() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let before = fs::read(&input).unwrap();
    let out = dir.path().join("out.safetensors");
    let o = resize(
        &input,
        &out,
        &["--map".as_ref(), input.as_os_str(), "--force".as_ref()],
    );
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(!out.exists(), "OUT is not left behind");
    assert_eq!(fs::read(&input).unwrap(), before);
}

#[test]
fn a_bad_figure_path_leaves_no_checkpoint_behind() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let out = dir.path().join("out.safetensors");
    let o = resize(&input, &out, &["--map", "/nonexistent-dir/maps.png"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(!out.exists());
    assert_eq!(entries(dir.path()), ["in.safetensors"]);
    // The figure and OUT together when all is well.
    let png = dir.path().join("maps.png");
    let o = resize(&input, &out, &["--map".as_ref(), png.as_os_str()]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(fs::read(&png).unwrap().starts_with(PNG_MAGIC));
    assert!(out.exists());
}

fn staged(path: &Path, bytes: &[u8], replace: bool) -> AtomicFile {
    let rules = OutputRules {
        sync: false,
        replace,
        mode_limit: 0o644,
    };
    let mut f = AtomicFile::create_with(path, &rules).unwrap();
    f.write(bytes, &mut write::Silent).unwrap();
    f
}

#[test]
fn outputs_committed_together_are_all_or_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let (a, b) = (dir.path().join("a.safetensors"), dir.path().join("b.png"));
    // The second cannot go in place (it appeared meanwhile): the first is not left there.
    let first = staged(&a, b"checkpoint", false);
    let second = staged(&b, b"figure", false);
    fs::write(&b, "someone else's").unwrap();
    let e = write::commit_all(vec![Pending::File(first), Pending::File(second)]).unwrap_err();
    assert_eq!(e.exit_code(), 5, "{e}");
    assert!(!a.exists());
    assert_eq!(fs::read(&b).unwrap(), b"someone else's");
    assert_eq!(entries(dir.path()), ["b.png"], "no temporaries");
    // Replacing: a failure puts the old first output back.
    fs::write(&a, "old checkpoint").unwrap();
    let first = staged(&a, b"checkpoint", true);
    let second = staged(&b, b"figure", false);
    assert!(write::commit_all(vec![Pending::File(first), Pending::File(second)]).is_err());
    assert_eq!(fs::read(&a).unwrap(), b"old checkpoint");
    assert_eq!(entries(dir.path()), ["a.safetensors", "b.png"]);
    // Both can go: both are there.
    fs::remove_file(&b).unwrap();
    let first = staged(&a, b"checkpoint", true);
    let second = staged(&b, b"figure", false);
    write::commit_all(vec![Pending::File(first), Pending::File(second)]).unwrap();
    assert_eq!(fs::read(&a).unwrap(), b"checkpoint");
    assert_eq!(fs::read(&b).unwrap(), b"figure");
    assert_eq!(entries(dir.path()), ["a.safetensors", "b.png"]);
}

#[test]
fn a_file_that_appears_at_out_during_the_write_is_never_replaced() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.safetensors");
    let file = staged(&out, b"new", false);
    fs::write(&out, "appeared").unwrap();
    let e = file.commit().unwrap_err();
    assert_eq!(e.exit_code(), 5);
    assert!(e.to_string().contains("appeared"), "{e}");
    assert_eq!(fs::read(&out).unwrap(), b"appeared");
    assert_eq!(entries(dir.path()), ["out.safetensors"]);

    let set = dir.path().join("set");
    let rules = OutputRules {
        sync: false,
        replace: false,
        mode_limit: 0o755,
    };
    let staged_dir = AtomicDir::create_with(&set, &rules).unwrap();
    fs::write(staged_dir.path().join("shard"), "new").unwrap();
    fs::create_dir(&set).unwrap();
    fs::write(set.join("mine.txt"), "kept").unwrap();
    assert_eq!(staged_dir.commit().unwrap_err().exit_code(), 5);
    assert_eq!(entries(&set), ["mine.txt"]);
    assert_eq!(entries(dir.path()), ["out.safetensors", "set"]);
}

/// A valid checkpoint whose second tensor is `len` zero bytes in a sparse file, so that the
/// copy takes a while.
fn big_sparse(dir: &Path, len: u64) -> PathBuf {
    let header = format!(
        r#"{{"pos_embed":{{"dtype":"F32","shape":[1,17,4],"data_offsets":[0,272]}},"big":{{"dtype":"U8","shape":[{len}],"data_offsets":[272,{}]}}}}"#,
        272 + len
    );
    let path = crafted(dir, "big.safetensors", &header, &[0u8; 272]);
    let f = fs::OpenOptions::new().write(true).open(&path).unwrap();
    f.set_len(8 + header.len() as u64 + 272 + len).unwrap();
    path
}

/// Start a long resize of a sparse input and wait until its temporary file exists.
fn start_long_copy(dir: &Path, out: &Path) -> (PathBuf, std::process::Child) {
    let input = big_sparse(dir, 1 << 30);
    let child = Command::new(env!("CARGO_BIN_EXE_posgrid"))
        .arg("resize")
        .arg(&input)
        .arg("-o")
        .arg(out)
        .args(["--grid", "8", "--slots", "1"])
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let start = Instant::now();
    while entries(dir).len() < 2 {
        assert!(
            start.elapsed() < Duration::from_secs(20),
            "no temporary file"
        );
        std::thread::sleep(Duration::from_millis(1));
    }
    (input, child)
}

#[test]
fn out_created_by_someone_else_during_the_run_survives() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.safetensors");
    let (_, child) = start_long_copy(dir.path(), &out);
    fs::write(&out, "precious").unwrap();
    let o = child.wait_with_output().unwrap();
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert_eq!(fs::read(&out).unwrap(), b"precious");
    assert_eq!(entries(dir.path()), ["big.safetensors", "out.safetensors"]);
}

#[test]
fn an_input_that_shrinks_during_the_copy_is_an_input_error() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("out.safetensors");
    let (input, child) = start_long_copy(dir.path(), &out);
    fs::OpenOptions::new()
        .write(true)
        .open(&input)
        .unwrap()
        .set_len(1000)
        .unwrap();
    let o = child.wait_with_output().unwrap();
    assert_eq!(o.status.code(), Some(3), "{}", stderr(&o));
    assert!(stderr(&o).contains("big.safetensors: "), "{}", stderr(&o));
    assert!(stderr(&o).contains("shrank"), "{}", stderr(&o));
    assert_eq!(entries(dir.path()), ["big.safetensors"]);
}

#[test]
fn force_replaces_only_regular_files_and_links() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let fifo = dir.path().join("fifo");
    let c = std::ffi::CString::new(fifo.to_str().unwrap()).unwrap();
    assert_eq!(unsafe { libc::mkfifo(c.as_ptr(), 0o644) }, 0);
    let socket = dir.path().join("socket");
    let _listener = std::os::unix::net::UnixListener::bind(&socket).unwrap();
    for (special, kind) in [(&fifo, "FIFO"), (&socket, "socket")] {
        let o = resize(&input, special, &["--force"]);
        assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
        assert!(stderr(&o).contains(kind), "{}", stderr(&o));
        assert!(!fs::symlink_metadata(special).unwrap().is_file());
    }
    // A link to a device (as /dev/stdout is) is not replaced either.
    let to_device = dir.path().join("stdout");
    symlink("/dev/null", &to_device).unwrap();
    let o = resize(&input, &to_device, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(stderr(&o).contains("character device"), "{}", stderr(&o));
    assert!(fs::symlink_metadata(&to_device)
        .unwrap()
        .file_type()
        .is_symlink());
    // A symbolic link to a file is replaced itself; what it points to is untouched.
    let target = dir.path().join("target.safetensors");
    fs::write(&target, "not ours").unwrap();
    let link = dir.path().join("link.safetensors");
    symlink(&target, &link).unwrap();
    let o = resize(&input, &link, &["--force"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert!(fs::symlink_metadata(&link).unwrap().is_file());
    assert_eq!(fs::read(&target).unwrap(), b"not ours");
}

/// A two-shard set with a config file beside it.
fn sharded_set(dir: &Path) -> PathBuf {
    let set = dir.join("set");
    fs::create_dir(&set).unwrap();
    let d = 16;
    write(
        &set,
        "model-00001-of-00002.safetensors",
        &[floats(
            "pos_embed",
            Dtype::F32,
            &[1, 1 + 14 * 14, d],
            &smooth_table(1, 14, 14, d, 5),
        )],
        None,
    );
    write(
        &set,
        "model-00002-of-00002.safetensors",
        &[floats(
            "head.weight",
            Dtype::F32,
            &[4, d],
            &noise(4 * d, 6, 0.1),
        )],
        None,
    );
    fs::write(
        set.join("model.safetensors.index.json"),
        r#"{"metadata":{"total_size":12800},"weight_map":{"pos_embed":"model-00001-of-00002.safetensors","head.weight":"model-00002-of-00002.safetensors"}}"#,
    )
    .unwrap();
    fs::write(set.join("config.json"), "{}").unwrap();
    set
}

#[test]
fn force_replaces_only_a_directory_that_is_an_earlier_output_set() {
    let dir = tempfile::tempdir().unwrap();
    let set = sharded_set(dir.path());
    let out = dir.path().join("out");
    let o = resize(&set, &out, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    // An earlier output set is replaced.
    let o = resize(&set, &out, &["--force"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(
        entries(dir.path()),
        ["out", "set"],
        "nothing left beside it"
    );
    // A user's file in it, a sub-directory, or no index: refused, nothing removed.
    fs::write(out.join("notes.txt"), "mine").unwrap();
    let o = resize(&set, &out, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(stderr(&o).contains("notes.txt"), "{}", stderr(&o));
    assert_eq!(fs::read(out.join("notes.txt")).unwrap(), b"mine");
    let home = dir.path().join("home");
    fs::create_dir_all(home.join("documents")).unwrap();
    fs::write(home.join("documents/letter.txt"), "mine").unwrap();
    let o = resize(&set, &home, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(home.join("documents/letter.txt").exists());
    let empty_of_index = dir.path().join("plain");
    fs::create_dir(&empty_of_index).unwrap();
    fs::write(empty_of_index.join("config.json"), "{}").unwrap();
    let o = resize(&set, &empty_of_index, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(empty_of_index.join("config.json").exists());
    // A set that posgrid did not write (another model downloaded there): refused.
    let downloaded = dir.path().join("downloaded");
    fs::create_dir(&downloaded).unwrap();
    for entry in fs::read_dir(&set).unwrap() {
        let entry = entry.unwrap();
        fs::copy(entry.path(), downloaded.join(entry.file_name())).unwrap();
    }
    let o = resize(&set, &downloaded, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(stderr(&o).contains("posgrid"), "{}", stderr(&o));
    assert!(downloaded.join("model.safetensors.index.json").exists());
    // A link at OUTDIR is not followed into a directory it names.
    let link = dir.path().join("link");
    symlink(&home, &link).unwrap();
    let o = resize(&set, &link, &["--force"]);
    assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    assert!(home.join("documents/letter.txt").exists());
}

#[test]
fn stale_temporaries_of_dead_processes_are_removed() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let out = dir.path().join("out.safetensors");
    let mut gone = Command::new("true").spawn().unwrap();
    let dead = gone.id();
    gone.wait().unwrap();
    let stale = format!(".out.safetensors.posgrid-{dead}-0.tmp");
    let stale_dir = format!(".out.safetensors.posgrid-{dead}-1.tmp");
    let alive = format!(".out.safetensors.posgrid-{}-0.tmp", std::process::id());
    let other_output = format!(".other.safetensors.posgrid-{dead}-0.tmp");
    let not_the_pattern = format!(".out.safetensors.posgrid-{dead}-0.tmp.keep");
    for name in [&stale, &alive, &other_output, &not_the_pattern] {
        fs::write(dir.path().join(name), "x").unwrap();
    }
    fs::create_dir(dir.path().join(&stale_dir)).unwrap();
    fs::write(dir.path().join(&stale_dir).join("shard"), "x").unwrap();
    let o = resize(&input, &out, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let left = entries(dir.path());
    assert!(!left.contains(&stale), "{left:?}");
    // A directory is only ever a set's temporary: beside a file output it is not posgrid's
    // (something may have been moved there in a race), so it is left alone.
    for kept in [&alive, &other_output, &not_the_pattern, &stale_dir] {
        assert!(left.contains(kept), "{kept} kept: {left:?}");
    }
}

#[test]
fn any_valid_output_name_works() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let name = format!("{}.safetensors", "n".repeat(255 - ".safetensors".len()));
    let out = dir.path().join(&name);
    let o = resize(&input, &out, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(entries(dir.path()), ["in.safetensors".to_string(), name]);
}

fn mode(path: &Path) -> u32 {
    fs::metadata(path).unwrap().permissions().mode() & 0o777
}

fn set_mode(path: &Path, mode: u32) {
    fs::set_permissions(path, fs::Permissions::from_mode(mode)).unwrap();
}

#[test]
fn outputs_are_never_more_open_than_the_input() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    set_mode(&input, 0o600);
    let (out, png) = (dir.path().join("out.safetensors"), dir.path().join("m.png"));
    let o = resize(&input, &out, &["--map".as_ref(), png.as_os_str()]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(mode(&out), 0o600);
    assert_eq!(mode(&png), 0o600);
    // --force keeps a replaced file's bits, narrowed to the input's.
    set_mode(&input, 0o644);
    set_mode(&out, 0o640);
    let o = resize(&input, &out, &["--force"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(mode(&out), 0o640);
    set_mode(&input, 0o600);
    set_mode(&out, 0o644);
    let o = resize(&input, &out, &["--force"]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(mode(&out), 0o600);
    // A set: the directory and each file as their inputs.
    let set = sharded_set(dir.path());
    set_mode(&set, 0o700);
    set_mode(&set.join("model-00002-of-00002.safetensors"), 0o600);
    let out_set = dir.path().join("out-set");
    let o = resize(&set, &out_set, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    assert_eq!(mode(&out_set), 0o700);
    assert_eq!(
        mode(&out_set.join("model-00002-of-00002.safetensors")),
        0o600
    );
}

/// Make `file` impossible to remove (immutable as root, a read-only directory otherwise);
/// false if this system allows neither.
fn pin(file: &Path) -> bool {
    let immutable = Command::new("chattr")
        .arg("+i")
        .arg(file)
        .stderr(Stdio::null())
        .status()
        .is_ok_and(|s| s.success());
    if !immutable {
        set_mode(file.parent().unwrap(), 0o555);
    }
    fs::remove_file(file).is_err()
}

fn unpin(file: &Path) {
    let _ = Command::new("chattr")
        .arg("-i")
        .arg(file)
        .stderr(Stdio::null())
        .status();
    set_mode(file.parent().unwrap(), 0o755);
}

#[test]
fn an_old_set_that_cannot_be_removed_entirely_is_reported() {
    let dir = tempfile::tempdir().unwrap();
    let out = dir.path().join("set");
    fs::create_dir(&out).unwrap();
    fs::write(out.join("x.safetensors.index.json"), "{}").unwrap();
    let stuck = out.join("x.safetensors");
    fs::write(&stuck, "old").unwrap();
    if !pin(&stuck) {
        unpin(&stuck);
        eprintln!("skipped: no way to make a file unremovable here");
        return;
    }
    let rules = OutputRules {
        sync: false,
        replace: true,
        mode_limit: 0o755,
    };
    let new = AtomicDir::create_with(&out, &rules).unwrap();
    fs::write(new.path().join("x.safetensors"), "new").unwrap();
    let committed = new.commit();
    let left: Vec<PathBuf> = fs::read_dir(dir.path())
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p != &out)
        .collect();
    for p in &left {
        unpin(&p.join("x.safetensors"));
    }
    let warnings = committed.unwrap();
    assert_eq!(fs::read(out.join("x.safetensors")).unwrap(), b"new");
    assert_eq!(left.len(), 1, "{left:?}");
    assert_eq!(warnings.len(), 1, "{warnings:?}");
    assert!(
        warnings[0].contains(&*left[0].to_string_lossy()),
        "{warnings:?}"
    );
}

#[test]
fn map_refuses_to_draw_over_either_input() {
    let dir = tempfile::tempdir().unwrap();
    let before = small_vit(dir.path(), "before.safetensors");
    let after = dir.path().join("after.safetensors");
    let o = resize(&before, &after, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let kept = fs::read(&after).unwrap();
    for target in [&before, &after] {
        let o = posgrid(&[
            "map".as_ref(),
            before.as_os_str(),
            after.as_os_str(),
            "-o".as_ref(),
            target.as_os_str(),
            "--force".as_ref(),
        ]);
        assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
    }
    assert_eq!(fs::read(&after).unwrap(), kept);
}

#[test]
fn a_figure_inside_a_set_directory_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let set = sharded_set(dir.path());
    let out = dir.path().join("out");
    let o = resize(&set, &out, &[] as &[&str]);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let listed = entries(&set);
    for figure in [set.join("maps.png"), out.join("maps.png")] {
        let o = resize(
            &set,
            &out,
            &["--map".as_ref(), figure.as_os_str(), "--force".as_ref()],
        );
        assert_eq!(o.status.code(), Some(5), "{}", stderr(&o));
        assert!(!figure.exists());
    }
    assert_eq!(entries(&set), listed);
}

#[test]
fn outputs_never_land_among_the_files_of_an_input_set() {
    // A set converted to one file, or a figure, written over a shard with --force: refused
    // before any work, the set unchanged.
    let dir = tempfile::tempdir().unwrap();
    let set = sharded_set(dir.path());
    let shard = set.join("model-00002-of-00002.safetensors");
    let before = fs::read(&shard).unwrap();
    let o = posgrid(&[
        "resize",
        s(&set),
        "-o",
        s(&shard),
        "--grid",
        "10",
        "--format",
        "safetensors",
        "--force",
    ]);
    assert_eq!(code(&o), 5, "{}", stderr(&o));
    assert!(stderr(&o).contains("inside the directory of the input set"));
    let o = posgrid(&["map", s(&set), "-o", s(&shard), "--force"]);
    assert_eq!(code(&o), 5, "{}", stderr(&o));
    assert_eq!(fs::read(&shard).unwrap(), before);
}

#[test]
fn a_closed_stdout_loses_the_printout_not_the_outcome() {
    // A reader that left (a closed pipe) or a full device: the run still ends with its own
    // exit status, never a panic.
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let out = dir.path().join("out.safetensors");
    for json in [false, true] {
        let _ = fs::remove_file(&out);
        let mut cmd = std::process::Command::new(env!("CARGO_BIN_EXE_posgrid"));
        cmd.args(["resize", s(&input), "-o", s(&out), "--grid", "10"]);
        if json {
            cmd.arg("--json");
        }
        let full = fs::OpenOptions::new()
            .write(true)
            .open("/dev/full")
            .unwrap();
        let status = cmd.stdout(full).status().unwrap();
        assert_eq!(status.code(), Some(0), "json {json}");
        assert!(out.exists());
    }
}

#[test]
fn a_file_output_named_like_a_directory_is_refused_before_any_work() {
    let dir = tempfile::tempdir().unwrap();
    let input = small_vit(dir.path(), "in.safetensors");
    let out = format!("{}/newdir/", dir.path().display());
    let o = posgrid(&["resize", s(&input), "-o", &out, "--grid", "10"]);
    assert_eq!(code(&o), 5, "{}", stderr(&o));
    assert!(stderr(&o).contains("ends with a slash"), "{}", stderr(&o));
    assert_eq!(entries(dir.path()), ["in.safetensors".to_string()]);
}
