//! The main job: open, discover, plan, compute the new tables, stream the patched checkpoint.
//! Every check that can fail runs before the temporary output file is created.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::checkpoint::sharded::ShardedSet;
use crate::checkpoint::torch::TorchFile;
use crate::checkpoint::writer::{self, Destination, OutEntry, Output};
use crate::checkpoint::{Dtype, Format, Source, TensorEntry, TensorSource};
use crate::discover::{self, Hints};
use crate::error::{Error, Result};
use crate::figure::{self, GridRows};
use crate::plan::{self, Plan, Request, TableChange};
use crate::resample;
use crate::selection::{self, SelectionRequest};
use crate::similarity::{self, Grid};
use crate::values;
use crate::write::{self, AtomicFile, Bar, OutputRules, Pending, Progress, Silent};

/// The metadata key posgrid adds, holding its provenance as a JSON string.
pub use crate::checkpoint::safetensors::PROVENANCE_KEY;

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
    pub format: Option<Format>,
    /// Which state dict of a tree-shaped checkpoint a flat output holds, and its names.
    pub selection: SelectionRequest,
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
    /// Tensors and other values of the input that the output does not hold (a flat output
    /// of a tree-shaped checkpoint holds one state dict).
    pub dropped: Vec<String>,
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
    let mut found = discover::discover(&source, &job.hints)?;
    found.warnings.extend(source.notes());
    let format = job
        .format
        .or_else(|| Format::from_extension(&job.output))
        .unwrap_or(source.format());
    let table_names: Vec<&str> = found.tables.iter().map(|t| t.name.as_str()).collect();
    let selection = selection::choose(&source, format, &table_names, &job.selection)?;
    let mut plan = plan::build(&source, &found, &job.request)?;
    // Tables the output does not hold are not resized.
    plan.retain(|name| selection::out_name(name, &selection).is_some());
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
        dropped: Vec::new(),
        warnings: found.warnings.clone(),
    };
    if plan.is_noop() {
        return Ok(report);
    }
    let writer = writer::for_format(format);
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
    let output = output_of(&source, &plan, &selection, &new_data);
    account_for(&mut report, &source, &output, &plan)?;
    writer.check(&output)?;
    let preview = writer.preview(&output)?;
    report.output_size = preview.size;
    if let Some(layout) = preview.layout {
        report.shards_rewritten = Some(layout.rewritten);
        report.shards_copied = Some(layout.copied);
    }
    report.warnings.extend(preview.notes);
    if job.dry_run {
        return Ok(report);
    }
    let figure = draw_map(job, &grids, &mut report.warnings)?;
    write_and_commit(job, &source, writer.as_ref(), &output, figure, &mut report)?;
    Ok(report)
}

/// The output entries: every tensor the selection keeps, under its output name, with its new
/// shape and bytes where it changed.
fn output_of<'a>(
    source: &'a Source,
    plan: &Plan,
    selection: &selection::Selection,
    new_data: &'a HashMap<String, Vec<u8>>,
) -> Output<'a> {
    Output {
        source: source.reader(),
        entries: source
            .entries()
            .iter()
            .filter_map(|t| {
                Some(OutEntry {
                    name: selection::out_name(&t.name, selection)?,
                    shape: plan.new_shape(&t.name).unwrap_or(&t.shape).clone(),
                    origin: t,
                    new: new_data.get(&t.name).map(Vec::as_slice),
                })
            })
            .collect(),
        provenance: provenance(plan),
    }
}

/// Check the output's names and record in the report what it copies, what it leaves out and
/// what no longer fits.
fn account_for(
    report: &mut ResizeReport,
    source: &Source,
    output: &Output,
    plan: &Plan,
) -> Result<()> {
    refuse_repeated_names(source, output)?;
    let written: HashSet<&str> = output
        .entries
        .iter()
        .map(|e| e.origin.name.as_str())
        .collect();
    report.dropped = dropped(source, output, &written);
    report.copied.retain(|n| written.contains(n.as_str()));
    if source.format() == Format::PyTorch {
        report.warnings.extend(stale_moments(output, plan));
    }
    Ok(())
}

/// Write the output beside OUT and put it in place together with the figure, if any.
fn write_and_commit(
    job: &ResizeJob,
    source: &Source,
    writer: &dyn writer::Writer,
    output: &Output,
    figure: Option<Vec<u8>>,
    report: &mut ResizeReport,
) -> Result<()> {
    let like = mode_source(job, source);
    let dest = Destination {
        path: &job.output,
        sync: job.sync,
        force: job.force,
        like,
    };
    // The ZIP writer reports no progress; a bar is drawn for the others.
    let mut progress = match writer.format() {
        Format::Npz => Box::new(Silent),
        _ => progress_for(job, report.output_size),
    };
    let written = writer.write(output, &dest, progress.as_mut())?;
    report.output_size = written.size;
    report.bytes_written = written.size;
    report.warnings.extend(written.warnings);
    report.warnings.extend(commit_with_map(
        job,
        like,
        written.pending,
        figure.as_deref(),
    )?);
    progress.finish();
    if figure.is_some() {
        report.map = job.map.clone();
    }
    Ok(())
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

/// What the input holds that the output does not: tensors left out, and (for a PyTorch
/// input) top-level values of its tree holding nothing written.
fn dropped(source: &Source, output: &Output, written: &HashSet<&str>) -> Vec<String> {
    let mut out: Vec<String> = source
        .entries()
        .iter()
        .filter(|t| !written.contains(t.name.as_str()))
        .map(|t| t.name.clone())
        .collect();
    if let Some(torch) = source.downcast::<TorchFile>() {
        // The first key of every tensor name, written or listed, by set.
        let first = |n: &str| n.split('/').next().unwrap_or(n).to_string();
        let seen: HashSet<String> = output
            .entries
            .iter()
            .map(|e| first(&e.origin.name))
            .chain(out.iter().map(|n| first(n)))
            .collect();
        out.extend(torch.root_keys().into_iter().filter(|k| !seen.contains(k)));
    }
    out
}

/// Two tensors written under one name (`--strip-prefix` can make them) would make a file no
/// reader accepts: refused, naming both.
fn refuse_repeated_names(source: &Source, output: &Output) -> Result<()> {
    let mut first: HashMap<&str, &str> = HashMap::new();
    for e in &output.entries {
        if let Some(other) = first.insert(&e.name, &e.origin.name) {
            return Err(Error::table(
                source.source_path(),
                format!(
                    "\"{other}\" and \"{}\" would both be written as \"{}\"; choose another --strip-prefix or --state-dict",
                    e.origin.name, e.name
                ),
            ));
        }
    }
    Ok(())
}

/// Tensors written unchanged that have the shape of a table before its resize: in a training
/// checkpoint, optimizer moments of the old table, which no longer fit the resized model.
fn stale_moments(output: &Output, plan: &Plan) -> Vec<String> {
    let old_shapes: Vec<&Vec<usize>> = plan.tables.iter().map(|c| &c.table.shape).collect();
    let stale: Vec<&str> = output
        .entries
        .iter()
        .filter(|e| e.new.is_none() && old_shapes.contains(&&e.origin.shape))
        .filter(|e| !plan.already_at_target.contains(&e.origin.name))
        .map(|e| e.origin.name.as_str())
        .collect();
    if stale.is_empty() {
        return Vec::new();
    }
    vec![format!(
        "kept unchanged with the shape of a table before its resize (optimizer moments?): {}; they no longer fit the resized model — pass --model-only to write only the model's state dict",
        stale.join(", ")
    )]
}

/// Check every output path before any work: OUT (a file, or a directory for a set) and the
/// figure, which must be neither OUT nor an input, nor inside a set directory.
fn check_outputs(source: &Source, job: &ResizeJob, format: Format) -> Result<()> {
    let set = source.downcast::<ShardedSet>();
    match (format, set) {
        (Format::ShardedSafetensors, Some(set)) => {
            write::check_destination_dir(set.dir(), &job.output, job.force)?
        }
        _ => write::check_destination(&job.input, &job.output, job.force)?,
    }
    if let Some(set) = set {
        // A set converted to one file must not land among the files it is read from.
        write::outside_set(&job.output, set.dir())?;
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
    if let Some(set) = set {
        if write::inside(png, set.dir()) {
            return clash("is inside the input set's directory");
        }
        if format == Format::ShardedSafetensors && write::inside(png, &job.output) {
            return clash("is inside the output directory, which is written as a whole");
        }
    }
    Ok(())
}

/// The input file whose permission bits limit the outputs' (a set's index for a set).
fn mode_source<'a>(job: &'a ResizeJob, source: &'a Source) -> &'a Path {
    match source.downcast::<ShardedSet>() {
        Some(set) => set.index_path(),
        None => &job.input,
    }
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

/// Provenance: the version and, per table, the grids, slots and options. A writer whose
/// container holds metadata adds a record already in its source under `previous`.
pub(crate) fn provenance(plan: &Plan) -> serde_json::Value {
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
    serde_json::json!({
        "tool": "posgrid",
        "version": env!("CARGO_PKG_VERSION"),
        "tables": tables,
        "companions": plan.companions.iter().map(|c| &c.name).collect::<Vec<_>>(),
    })
}
