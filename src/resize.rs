//! The main job: open, discover, plan, compute the new tables, stream the patched checkpoint.
//! Every check that can fail runs before the temporary output file is created.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::checkpoint::sharded::ShardedSet;
use crate::checkpoint::{safetensors, Checkpoint, Dtype, Source, TensorEntry, TensorSource};
use crate::discover::{self, Hints};
use crate::error::{Error, Result};
use crate::figure::{self, GridRows};
use crate::output::{self, OutputFormat};
use crate::plan::{self, Plan, Request, TableChange};
use crate::resample;
use crate::similarity::{self, Grid};
use crate::values;
use crate::write::{self, AtomicDir, AtomicFile, Bar, OutputRules, Pending, Progress, Silent};

/// The metadata key posgrid adds, holding its provenance as a JSON string.
pub const PROVENANCE_KEY: &str = "posgrid";

/// Everything `resize` needs.
#[derive(Debug, Clone)]
pub struct ResizeJob {
    pub input: PathBuf,
    pub output: PathBuf,
    pub hints: Hints,
    pub request: Request,
    /// Print the plan, write nothing.
    pub dry_run: bool,
    /// Replace an existing output.
    pub force: bool,
    /// Sync data to disk before the rename (durable); off for scratch outputs.
    pub sync: bool,
    /// Draw a progress bar on stderr.
    pub progress: bool,
    /// Reference positions per axis for the fidelity score.
    pub refs: usize,
    /// Also draw the before/after similarity maps of the first table to this PNG.
    pub map: Option<PathBuf>,
    /// The output container; `None` follows OUT's extension, then the input's format.
    pub format: Option<OutputFormat>,
}

/// One resized table in the report.
#[derive(Debug, Clone, Serialize)]
pub struct TableReport {
    pub name: String,
    pub dtype: String,
    pub slots: usize,
    pub from: [usize; 2],
    pub to: [usize; 2],
    pub shape: Vec<usize>,
    pub new_shape: Vec<usize>,
    pub kind: discover::Kind,
    pub kernel: resample::Kernel,
    pub coords: resample::Coords,
    pub edges: resample::Edges,
    pub antialias: bool,
    pub cubic_a: Option<f64>,
    /// `resampled`, or `rebuilt` for a sine-cosine table built anew on the target grid.
    pub method: &'static str,
    pub companions: Vec<String>,
    /// Similarity-map fidelity of the resized table (1 is perfect).
    pub fidelity: Option<f64>,
}

/// What `resize` did (or, in a dry run, would do).
#[derive(Debug, Clone, Serialize)]
pub struct ResizeReport {
    pub input: PathBuf,
    pub output: PathBuf,
    pub dry_run: bool,
    /// True when every selected table was already at its target and nothing was written.
    pub nothing_to_do: bool,
    pub tables: Vec<TableReport>,
    pub already_at_target: Vec<String>,
    pub companions: Vec<String>,
    pub copied: Vec<String>,
    pub bytes_written: u64,
    pub output_size: u64,
    /// For a sharded set: the shards rewritten and the shards copied unchanged.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub shards_rewritten: Option<Vec<String>>,
    #[serde(skip_serializing_if = "Option::is_none")]
    pub shards_copied: Option<Vec<String>>,
    /// The similarity-map PNG, when one was drawn.
    pub map: Option<PathBuf>,
    pub warnings: Vec<String>,
}

fn table_report(change: &TableChange) -> TableReport {
    let o = &change.options;
    TableReport {
        name: change.table.name.clone(),
        dtype: change.table.dtype.to_string(),
        slots: change.table.slots,
        from: change.from,
        to: change.to,
        shape: change.table.shape.clone(),
        new_shape: change.new_shape.clone(),
        kind: change.table.kind,
        kernel: o.kernel,
        coords: o.coords,
        edges: o.edges,
        antialias: change.antialias_applied,
        cubic_a: (o.kernel == resample::Kernel::Bicubic && !change.rebuild).then_some(o.cubic_a),
        method: if change.rebuild {
            "rebuilt"
        } else {
            "resampled"
        },
        companions: change.table.companions.clone(),
        fidelity: None,
    }
}

/// Run a resize job.
pub fn run(job: &ResizeJob) -> Result<ResizeReport> {
    let source = Source::open(&job.input)?;
    let found = discover::discover(&source, &job.hints)?;
    let plan = plan::build(&source, &found, &job.request)?;
    let mut report = ResizeReport {
        input: job.input.clone(),
        output: job.output.clone(),
        dry_run: job.dry_run,
        nothing_to_do: plan.is_noop(),
        tables: plan.tables.iter().map(table_report).collect(),
        already_at_target: plan.already_at_target.clone(),
        companions: plan.companions.iter().map(|c| c.name.clone()).collect(),
        copied: source
            .entries()
            .iter()
            .filter(|t| !plan.changes(&t.name))
            .map(|t| t.name.clone())
            .collect(),
        bytes_written: 0,
        output_size: 0,
        shards_rewritten: None,
        shards_copied: None,
        map: None,
        warnings: found.warnings.clone(),
    };
    if plan.is_noop() {
        return Ok(report);
    }
    let format = job
        .format
        .or_else(|| OutputFormat::from_extension(&job.output));
    check_outputs(&source, job, format)?;

    let Computed {
        bytes: new_data,
        grids,
    } = compute(&source, &plan, job.request.allow_nonfinite)?;
    for (report_table, (change, before, after)) in report.tables.iter_mut().zip(&grids) {
        let (fidelity, notes) = table_fidelity(change, before, after, job);
        report_table.fidelity = fidelity;
        report.warnings.extend(notes);
    }
    let data_size: u64 = source
        .entries()
        .iter()
        .map(|t| {
            new_data
                .get(&t.name)
                .map_or(t.byte_len(), |b| b.len() as u64)
        })
        .sum();
    let figure = if job.dry_run {
        None
    } else {
        draw_map(job, &grids, &mut report.warnings)?
    };
    match (&source, format) {
        (Source::Sharded(set), _) => {
            let written = sharded_output(set, &plan, &new_data, job, figure.as_deref())?;
            report.output_size = written.size;
            report.shards_rewritten = Some(written.rewritten);
            report.shards_copied = Some(written.copied);
            report.warnings.extend(written.warnings);
        }
        (Source::Single(ckpt), None | Some(OutputFormat::Safetensors)) => {
            let header = patched_header(ckpt, &plan, &new_data);
            report.output_size = patched_size(ckpt, &header, &new_data);
            if !job.dry_run {
                let mut progress = progress_for(job, report.output_size);
                let mut out = AtomicFile::create_with(&job.output, &output_rules(job))?;
                stream(ckpt, &header, &new_data, &mut out, progress.as_mut())?;
                let warnings =
                    commit_with_map(job, &job.input, Pending::File(out), figure.as_deref())?;
                report.warnings.extend(warnings);
                progress.finish();
            }
        }
        (_, format) => {
            // npz in or out: sizes are known only once written (compression, member headers).
            report.output_size = data_size;
            let to_npz = match format {
                Some(f) => f == OutputFormat::Npz,
                None => matches!(source, Source::Npz(_)),
            };
            if to_npz {
                report.warnings.push(
                    "npz archives hold no metadata: the provenance record is not stored".into(),
                );
            }
            if !job.dry_run {
                // The ZIP writer reports no progress; a bar is drawn for safetensors output only.
                let mut progress: Box<dyn Progress> = if to_npz {
                    Box::new(Silent)
                } else {
                    progress_for(job, data_size)
                };
                let mut out = AtomicFile::create_with(&job.output, &output_rules(job))?;
                match (&source, to_npz) {
                    (Source::Npz(n), true) => output::patch_npz(n, &plan, &new_data, &mut out)?,
                    (_, true) => output::to_npz(&source, &plan, &new_data, &mut out)?,
                    (_, false) => output::to_safetensors(
                        &source,
                        &plan,
                        &new_data,
                        &mut out,
                        progress.as_mut(),
                    )?,
                }
                report.output_size = out
                    .file()
                    .metadata()
                    .map_err(|e| write::write_error(&job.output, "cannot write", e))?
                    .len();
                let warnings =
                    commit_with_map(job, &job.input, Pending::File(out), figure.as_deref())?;
                report.warnings.extend(warnings);
                progress.finish();
            }
        }
    }
    if job.dry_run {
        return Ok(report);
    }
    report.bytes_written = report.output_size;
    if figure.is_some() {
        report.map = job.map.clone();
    }
    Ok(report)
}

/// What the memory guard leaves for the maps and the fidelity score of a table once its
/// resize is paid for.
fn fidelity_budget(change: &TableChange, job: &ResizeJob) -> similarity::Budget {
    similarity::Budget::memory(job.request.memory_limit.saturating_sub(change.needed_bytes))
}

/// The fidelity score of one resized table (`None` when undefined or over the guard) and
/// the warnings that explain it.
fn table_fidelity(
    change: &TableChange,
    before: &[f32],
    after: &[f32],
    job: &ResizeJob,
) -> (Option<f64>, Vec<String>) {
    let grid = |rows, [h, w]: [usize; 2]| Grid {
        rows,
        h,
        w,
        d: change.table.dim,
    };
    let name = &change.table.name;
    match similarity::score(
        grid(before, change.from),
        grid(after, change.to),
        job.refs,
        fidelity_budget(change, job),
    ) {
        Ok((f, note)) => {
            let notes = note
                .map(|n| format!("\"{name}\": fidelity from {n}"))
                .into_iter()
                .chain(f.note(name))
                .collect();
            (f.score, notes)
        }
        Err(e) => (
            None,
            vec![format!("\"{name}\": fidelity not computed: {e}")],
        ),
    }
}

/// Check every output path before any work: OUT (a file, or a directory for a set) and the
/// figure, which must be neither OUT nor an input, nor inside a set directory.
fn check_outputs(source: &Source, job: &ResizeJob, format: Option<OutputFormat>) -> Result<()> {
    match source {
        Source::Sharded(set) => {
            if format == Some(OutputFormat::Npz) {
                return Err(Error::Usage("a sharded set is written as a sharded safetensors set; --format npz does not apply".into()));
            }
            write::check_destination_dir(set.dir(), &job.output, job.force)?
        }
        _ => write::check_destination(&job.input, &job.output, job.force)?,
    }
    let Some(png) = &job.map else {
        return Ok(());
    };
    write::check_destination(mode_source(job, source), png, job.force)?;
    let clash = |why: &str| {
        Err(Error::write(
            png,
            format!("{why}; give the figure a path of its own"),
        ))
    };
    if write::same_destination(png, &job.output) {
        return clash("is also the checkpoint output (-o)");
    }
    if let Source::Sharded(set) = source {
        if write::inside(png, set.dir()) {
            return clash("is inside the input set's directory");
        }
        if write::inside(png, &job.output) {
            return clash("is inside the output directory, which is written as a whole");
        }
    }
    Ok(())
}

/// The input file whose permission bits limit the outputs' (a set's index for a set).
fn mode_source<'a>(job: &'a ResizeJob, source: &'a Source) -> &'a Path {
    match source {
        Source::Sharded(set) => set.index_path(),
        _ => &job.input,
    }
}

fn output_rules(job: &ResizeJob) -> OutputRules {
    OutputRules::like(&job.input, job.sync, job.force)
}

/// The before/after similarity maps of the first table as PNG bytes, if asked for. Drawn in
/// memory before anything is written, so the figure and OUT can be committed together.
fn draw_map(
    job: &ResizeJob,
    grids: &[(&TableChange, Vec<f32>, Vec<f32>)],
    warnings: &mut Vec<String>,
) -> Result<Option<Vec<u8>>> {
    let (Some(_), Some((change, before, after))) = (&job.map, grids.first()) else {
        return Ok(None);
    };
    let rows = GridRows::borrowed;
    let mut after_table = change.table.clone();
    after_table.grid = change.to;
    let drawn = figure::figure(
        &job.input,
        &rows(&change.table, before),
        Some(&rows(&after_table, after)),
        job.refs,
        fidelity_budget(change, job),
    )?;
    warnings.extend(drawn.notes.iter().cloned());
    Ok(Some(drawn.png))
}

/// Write the figure (if any) to its temporary, then put OUT and the figure in place together:
/// both or neither.
fn commit_with_map(
    job: &ResizeJob,
    like: &Path,
    out: Pending,
    png: Option<&[u8]>,
) -> Result<Vec<String>> {
    let mut pending = vec![out];
    if let (Some(path), Some(bytes)) = (&job.map, png) {
        let mut file =
            AtomicFile::create_with(path, &OutputRules::like(like, job.sync, job.force))?;
        file.write(bytes, &mut Silent)?;
        pending.push(Pending::File(file));
    }
    write::commit_all(pending)
}

fn progress_for(job: &ResizeJob, total: u64) -> Box<dyn Progress> {
    if job.progress {
        Box::new(Bar::new(total))
    } else {
        Box::new(Silent)
    }
}

/// Size of a patched single file: the new header plus every tensor's new or old bytes.
fn patched_size(ckpt: &Checkpoint, header: &[u8], new_data: &HashMap<String, Vec<u8>>) -> u64 {
    header.len() as u64
        + ckpt
            .tensors()
            .iter()
            .map(|t| {
                new_data
                    .get(&t.name)
                    .map_or(t.byte_len(), |b| b.len() as u64)
            })
            .sum::<u64>()
}

/// What writing a sharded set produced.
struct ShardedOutput {
    size: u64,
    rewritten: Vec<String>,
    copied: Vec<String>,
    warnings: Vec<String>,
}

/// Write a sharded set into a temporary directory beside OUTDIR, then rename it into place:
/// shards holding a changed tensor are rewritten (streaming), the others and any other files
/// of the set's directory copied unchanged, and the index written with the new total size.
fn sharded_output(
    set: &ShardedSet,
    plan: &Plan,
    new_data: &HashMap<String, Vec<u8>>,
    job: &ResizeJob,
    figure: Option<&[u8]>,
) -> Result<ShardedOutput> {
    let index_name = set
        .index_path()
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let mut out = ShardedOutput {
        size: 0,
        rewritten: Vec::new(),
        copied: Vec::new(),
        warnings: Vec::new(),
    };
    let mut headers: Vec<Option<Vec<u8>>> = Vec::new();
    for (name, ckpt) in &set.shards {
        if ckpt
            .tensors()
            .iter()
            .any(|t| new_data.contains_key(&t.name))
        {
            let header = patched_header(ckpt, plan, new_data);
            out.size += patched_size(ckpt, &header, new_data);
            headers.push(Some(header));
            out.rewritten.push(name.clone());
        } else {
            out.size += ckpt.file_len();
            headers.push(None);
            out.copied.push(name.clone());
        }
    }
    let total_size: u64 = set
        .entries()
        .iter()
        .map(|t| {
            new_data
                .get(&t.name)
                .map_or(t.byte_len(), |b| b.len() as u64)
        })
        .sum();
    let mut index = set.index.clone();
    let metadata = index
        .entry("metadata")
        .or_insert_with(|| serde_json::Value::Object(Default::default()));
    if let serde_json::Value::Object(m) = metadata {
        m.insert("total_size".into(), serde_json::Value::from(total_size));
    }
    let index_text = serde_json::to_string_pretty(&index).expect("JSON serialises") + "\n";
    out.size += index_text.len() as u64;
    let shard_names: Vec<&str> = set.shards.iter().map(|(n, _)| n.as_str()).collect();
    let others: Vec<PathBuf> = std::fs::read_dir(set.dir())
        .map_err(|e| Error::read(set.dir(), e))?
        .filter_map(|e| e.ok())
        .filter(|e| e.file_type().is_ok_and(|t| t.is_file()))
        .map(|e| e.path())
        .filter(|p| {
            let n = p
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            n != index_name && !shard_names.contains(&n.as_str()) && !n.starts_with('.')
        })
        .collect();
    if !others.is_empty() {
        let names: Vec<String> = others
            .iter()
            .filter_map(|p| p.file_name())
            .map(|n| n.to_string_lossy().into_owned())
            .collect();
        out.warnings.push(format!(
            "copied unchanged beside the shards: {} (update any image size they record)",
            names.join(", ")
        ));
        for p in &others {
            out.size += std::fs::metadata(p).map_err(|e| Error::read(p, e))?.len();
        }
    }
    if job.dry_run {
        return Ok(out);
    }
    let mut progress = progress_for(job, out.size);
    let dir = AtomicDir::create_with(
        &job.output,
        &OutputRules::like(set.dir(), job.sync, job.force),
    )?;
    // Files inside the new directory: each as its input, never replacing anything.
    let member = |name: &std::ffi::OsStr, like: &Path| {
        AtomicFile::create_with(
            &dir.path().join(name),
            &OutputRules::like(like, job.sync, false),
        )
    };
    for ((name, ckpt), header) in set.shards.iter().zip(&headers) {
        let mut file = member(name.as_ref(), ckpt.path())?;
        match header {
            Some(h) => stream(ckpt, h, new_data, &mut file, progress.as_mut())?,
            None => file.copy_from(
                ckpt.file(),
                ckpt.path(),
                0,
                ckpt.file_len(),
                progress.as_mut(),
            )?,
        }
        file.commit()?;
    }
    for p in &others {
        let name = p.file_name().expect("listed files have names");
        let input = std::fs::File::open(p).map_err(|e| Error::read(p, e))?;
        let len = input.metadata().map_err(|e| Error::read(p, e))?.len();
        let mut file = member(name, p)?;
        file.copy_from(&input, p, 0, len, progress.as_mut())?;
        file.commit()?;
    }
    let mut file = member(index_name.as_ref(), set.index_path())?;
    file.write(index_text.as_bytes(), progress.as_mut())?;
    file.commit()?;
    // Checked again: OUTDIR may have changed during the write.
    write::check_destination_dir(set.dir(), &job.output, job.force)?;
    out.warnings.extend(commit_with_map(
        job,
        set.index_path(),
        Pending::Dir(dir),
        figure,
    )?);
    progress.finish();
    Ok(out)
}

/// The new bytes of every changed tensor, by name, and each table's grid rows before and
/// after (f32, without class slots) for the similarity measures.
struct Computed<'a> {
    bytes: HashMap<String, Vec<u8>>,
    grids: Vec<(&'a TableChange, Vec<f32>, Vec<f32>)>,
}

fn compute<'a>(
    ckpt: &dyn TensorSource,
    plan: &'a Plan,
    allow_nonfinite: bool,
) -> Result<Computed<'a>> {
    let mut out = Computed {
        bytes: HashMap::new(),
        grids: Vec::new(),
    };
    for change in &plan.tables {
        let entry = ckpt.find(&change.table.name).expect("planned tables exist");
        let raw = ckpt.bytes(entry)?;
        let (bytes, before, after) =
            resized_table(ckpt.source_path(), entry, &raw, change, allow_nonfinite)?;
        out.bytes.insert(entry.name.clone(), bytes);
        out.grids.push((change, before, after));
    }
    for c in &plan.companions {
        let entry = ckpt.find(&c.name).expect("planned companions exist");
        let bytes = values::encode_range(entry.dtype, c.rows)
            .map_err(|e| values::value_error(ckpt.source_path(), &c.name, e))?;
        out.bytes.insert(c.name.clone(), bytes);
    }
    Ok(out)
}

/// Class slots copied byte for byte, grid rows resampled in f32 (f64 for F64 tables) and
/// rounded to the table's dtype, nearest even. Also returns the grid rows before and after.
/// Non-finite values are refused in the input (class rows included) and in the output, where
/// a kernel with negative lobes can overshoot past the dtype's largest value.
fn resized_table(
    path: &Path,
    entry: &TensorEntry,
    raw: &[u8],
    change: &TableChange,
    allow_nonfinite: bool,
) -> Result<(Vec<u8>, Vec<f32>, Vec<f32>)> {
    let t = &change.table;
    let elem = entry.dtype.bitsize() / 8;
    let slot_bytes = t.slots * t.dim * elem;
    let (slots, grid) = raw.split_at(slot_bytes);
    if !allow_nonfinite {
        refuse_nonfinite_input(path, t, entry.dtype, slots, grid)?;
    }
    let out_len = slot_bytes + change.to[0] * change.to[1] * t.dim * elem;
    let oom = |e| values::out_of_memory(path, &format!("resizing \"{}\"", t.name), e);
    let mut bytes = values::try_with_capacity(out_len).map_err(oom)?;
    bytes.extend_from_slice(slots);
    let value_error = |e| values::value_error(path, &format!("resizing \"{}\"", t.name), e);
    // Computed in row order [H·W, D]; stored in the table's own layout.
    let (before, after) = if entry.dtype == Dtype::F64 {
        let v = values::decode_f64(entry.dtype, grid).map_err(value_error)?;
        let v = t.to_row_order(v).map_err(oom)?;
        let r = new_grid(&v, change).map_err(|e| resample_error(path, t, e))?;
        let stored = t.from_row_order(&r).map_err(oom)?;
        values::encode_f64_into(entry.dtype, &stored, &mut bytes).map_err(value_error)?;
        let narrow = |x: &[f64]| values::try_collect(x.len(), x.iter().map(|v| *v as f32));
        (narrow(&v).map_err(oom)?, narrow(&r).map_err(oom)?)
    } else {
        let v = values::decode_f32(entry.dtype, grid).map_err(value_error)?;
        let v = t.to_row_order(v).map_err(oom)?;
        let r = new_grid(&v, change).map_err(|e| resample_error(path, t, e))?;
        let stored = t.from_row_order(&r).map_err(oom)?;
        values::encode_f32_into(entry.dtype, &stored, &mut bytes).map_err(value_error)?;
        drop(stored);
        (v, r)
    };
    if !allow_nonfinite {
        refuse_nonfinite_output(path, change, entry.dtype, &bytes[slot_bytes..])?;
    }
    Ok((bytes, before, after))
}

/// The new grid rows: resampled, or for `--rebuild-sincos` built anew.
fn new_grid<T: resample::Sample>(
    v: &[T],
    change: &TableChange,
) -> std::result::Result<Vec<T>, resample::ResampleError> {
    let (from, to) = (
        (change.from[0], change.from[1]),
        (change.to[0], change.to[1]),
    );
    let t = &change.table;
    match (change.rebuild, t.sincos_first_axis) {
        (true, Some(first)) => Ok(crate::sincos::build(to.0, to.1, t.dim, first)
            .expect("a recognised sine-cosine table has a width divisible by 4")
            .into_iter()
            .map(T::from_f64)
            .collect()),
        _ => resample::resample(v, from, t.dim, to, &change.options),
    }
}

fn resample_error(path: &Path, t: &discover::Table, e: resample::ResampleError) -> Error {
    match e {
        resample::ResampleError::OutOfMemory { bytes } => values::out_of_memory(
            path,
            &format!("resizing \"{}\"", t.name),
            values::OutOfMemory { bytes },
        ),
        other => Error::Usage(format!("{}: {other}", t.name)),
    }
}

fn refuse_nonfinite_input(
    path: &Path,
    t: &discover::Table,
    dtype: Dtype,
    slots: &[u8],
    grid: &[u8],
) -> Result<()> {
    let (in_slots, in_grid) = (
        values::count_nonfinite(dtype, slots),
        values::count_nonfinite(dtype, grid),
    );
    if in_slots + in_grid == 0 {
        return Ok(());
    }
    let place = match (in_slots, in_grid) {
        (0, _) => "in its grid rows".to_string(),
        (_, 0) => "in its class rows".to_string(),
        (s, g) => format!("{s} in its class rows, {g} in its grid rows"),
    };
    Err(Error::refused(
        path,
        format!(
            "table \"{}\" holds {} NaN or infinite value(s) ({place}); pass --allow-nonfinite to resize it anyway",
            t.name,
            in_slots + in_grid
        ),
    ))
}

fn refuse_nonfinite_output(
    path: &Path,
    change: &TableChange,
    dtype: Dtype,
    grid: &[u8],
) -> Result<()> {
    let bad = values::count_nonfinite(dtype, grid);
    if bad == 0 {
        return Ok(());
    }
    Err(Error::refused(
        path,
        format!(
            "resizing table \"{}\" to {}x{} with the {} kernel gives {bad} infinite or NaN value(s) in {dtype} \
(the kernel overshoots values near the largest {dtype} can hold); use a kernel that cannot overshoot \
(--kernel bilinear, area or nearest), or pass --allow-nonfinite to write them anyway",
            change.table.name, change.to[0], change.to[1], change.options.kernel
        ),
    ))
}

/// Tensors in data order (by their offsets in the input).
fn data_order(ckpt: &Checkpoint) -> Vec<&TensorEntry> {
    let mut order: Vec<&TensorEntry> = ckpt.tensors().iter().collect();
    order.sort_by_key(|t| (t.begin, t.end));
    order
}

/// The header of the output: same key order and data order, new shapes and offsets, the
/// metadata kept with the provenance key added.
fn patched_header(ckpt: &Checkpoint, plan: &Plan, new_data: &HashMap<String, Vec<u8>>) -> Vec<u8> {
    let mut offsets: HashMap<&str, (u64, u64)> = HashMap::new();
    let mut cursor = 0u64;
    for t in data_order(ckpt) {
        let len = new_data
            .get(&t.name)
            .map_or(t.byte_len(), |b| b.len() as u64);
        offsets.insert(&t.name, (cursor, cursor + len));
        cursor += len;
    }
    let entries: Vec<_> = ckpt
        .tensors()
        .iter()
        .map(|t| {
            let (b, e) = offsets[t.name.as_str()];
            let shape = plan.new_shape(&t.name).unwrap_or(&t.shape).clone();
            (t.name.clone(), t.dtype, shape, b, e)
        })
        .collect();
    let mut metadata: Vec<(String, String)> =
        ckpt.metadata().map(<[_]>::to_vec).unwrap_or_default();
    let previous = metadata
        .iter()
        .position(|(k, _)| k == PROVENANCE_KEY)
        .map(|i| metadata.remove(i).1);
    metadata.push((PROVENANCE_KEY.to_string(), provenance(plan, previous)));
    let position = if ckpt.metadata().is_some() {
        ckpt.header().metadata_position
    } else {
        0
    };
    safetensors::encode_header(&entries, Some(&metadata), position)
}

/// Provenance: the version and, per table, the grids, slots and options. A provenance record
/// already in the input is kept under `previous`.
pub(crate) fn provenance(plan: &Plan, previous: Option<String>) -> String {
    let tables: Vec<serde_json::Value> = plan
        .tables
        .iter()
        .map(|c| {
            serde_json::json!({
                "name": c.table.name,
                "method": if c.rebuild { "rebuilt" } else { "resampled" },
                "from": c.from,
                "to": c.to,
                "slots": c.table.slots,
                "kernel": c.options.kernel,
                "coords": c.options.coords,
                "edges": c.options.edges,
                "antialias": c.options.antialias,
                "antialias_applied": c.antialias_applied,
                "cubic_a": c.options.cubic_a,
            })
        })
        .collect();
    let mut record = serde_json::json!({
        "tool": "posgrid",
        "version": env!("CARGO_PKG_VERSION"),
        "tables": tables,
        "companions": plan.companions.iter().map(|c| &c.name).collect::<Vec<_>>(),
    });
    if let Some(p) = previous {
        record["previous"] = serde_json::Value::String(p);
    }
    record.to_string()
}

/// Write the header, then the data in input order: untouched runs copied in the kernel, new
/// tensors written from memory.
fn stream(
    ckpt: &Checkpoint,
    header: &[u8],
    new_data: &HashMap<String, Vec<u8>>,
    out: &mut AtomicFile,
    progress: &mut dyn Progress,
) -> Result<()> {
    out.write(header, progress)?;
    let mut run: Option<(u64, u64)> = None; // a pending range of untouched input bytes
    for t in data_order(ckpt) {
        match new_data.get(&t.name) {
            None => {
                run = match run {
                    Some((b, e)) if e == t.begin => Some((b, t.end)),
                    Some((b, e)) => {
                        out.copy_from(ckpt.file(), ckpt.path(), b, e - b, progress)?;
                        Some((t.begin, t.end))
                    }
                    None => Some((t.begin, t.end)),
                }
            }
            Some(bytes) => {
                if let Some((b, e)) = run.take() {
                    out.copy_from(ckpt.file(), ckpt.path(), b, e - b, progress)?;
                }
                out.write(bytes, progress)?;
            }
        }
    }
    if let Some((b, e)) = run {
        out.copy_from(ckpt.file(), ckpt.path(), b, e - b, progress)?;
    }
    Ok(())
}
