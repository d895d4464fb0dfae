//! The main job: open, discover, plan, compute the new tables, stream the patched checkpoint.
//! Every check that can fail runs before the temporary output file is created.

use std::collections::{HashMap, HashSet};
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::checkpoint::directory::{self, ModelDir};
use crate::checkpoint::sharded::ShardedSet;
use crate::checkpoint::torch::TorchFile;
use crate::checkpoint::writer::{self, Destination, OutEntry, Output};
use crate::checkpoint::{Format, Source, TensorSource};
use crate::config_files::{self, ConfigChange};
use crate::error::{Error, Result};
use crate::figure::{self, GridRows};
use crate::kinds::{self, Hints};
use crate::kinds::{Change, ChangeReport, Images, Kind};
use crate::plan::{self, Plan, Request};
use crate::render::offsets::{self, OffsetGrid};
use crate::selection::{self, SelectionRequest};
use crate::similarity::{self, Grid};
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
    /// Leave the configuration files of a directory output as they are.
    pub keep_config: bool,
}

/// What `resize` did (or, in a dry run, would do).
#[derive(Debug, Clone, Serialize)]
pub struct ResizeReport {
    pub input: PathBuf,
    pub output: PathBuf,
    pub dry_run: bool,
    /// True when every selected table was already at its target and nothing was written.
    pub nothing_to_do: bool,
    pub tables: Vec<ChangeReport>,
    pub already_at_target: Vec<String>,
    pub companions: Vec<String>,
    pub copied: Vec<String>,
    pub bytes_written: u64,
    pub output_size: u64,
    /// Bytes of the output whose blocks the file system shares with other files (the input):
    /// measured from the output's extent map after the write, 0 where nothing is shared.
    pub bytes_shared: u64,
    /// Bytes of the output in blocks of its own (written or copied): `output_size` less
    /// `bytes_shared`.
    pub bytes_copied: u64,
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
    /// Configuration values set to the new size in a directory output (file, key path, old,
    /// new).
    pub config_changes: Vec<ConfigChange>,
    pub warnings: Vec<String>,
}

/// Run a resize job.
pub fn run(job: &ResizeJob) -> Result<ResizeReport> {
    let source = Source::open(&job.input)?;
    let hints = Hints {
        recorded_grid: config_files::grid_beside(&source, &job.input),
        ..job.hints.clone()
    };
    let mut found = kinds::discover(&source, &hints)?;
    found.warnings.extend(source.notes());
    found
        .warnings
        .extend(plan::unused_flags(&found, &job.request));
    let format = job
        .format
        .or_else(|| Format::from_extension(&job.output))
        .unwrap_or(source.format());
    let table_names: Vec<&str> = found.tables.iter().map(|t| t.name.as_str()).collect();
    let selection = selection::choose(&source, format, &table_names, &job.selection)?;
    let mut plan = plan::build(&source, &found, &job.request)?;
    // Tables the output does not hold are not resized.
    plan.retain(|name| selection::out_name(name, &selection).is_some());
    let mut report = planned_report(job, &source, &plan, found.warnings.clone());
    if plan.is_noop() {
        return Ok(report);
    }
    let writer = writer::for_format(format);
    check_outputs(&source, job, format)?;

    let Outcome {
        bytes: new_data,
        images,
    } = compute(&source, &plan, job.request.allow_nonfinite)?;
    score(&mut report, &images, job);
    let mut output = output_of(&job.output, &source, &plan, &selection, &new_data);
    output.edits = update_configs(&source, job, format, &plan, &mut report)?;
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
    let figure = draw_map(job, &images, &mut report.warnings)?;
    write_and_commit(job, &source, writer.as_ref(), &output, figure, &mut report)?;
    Ok(report)
}

/// The report of `plan` before anything is computed or written.
fn planned_report(
    job: &ResizeJob,
    source: &Source,
    plan: &Plan,
    warnings: Vec<String>,
) -> ResizeReport {
    let rewritten = plan.new_shapes();
    ResizeReport {
        input: job.input.clone(),
        output: job.output.clone(),
        dry_run: job.dry_run,
        nothing_to_do: plan.is_noop(),
        tables: plan.changes.iter().map(|c| c.report()).collect(),
        already_at_target: plan.already_at_target.clone(),
        companions: plan.companions(),
        copied: source
            .entries()
            .iter()
            .filter(|t| !rewritten.contains_key(t.name.as_str()))
            .map(|t| t.name.clone())
            .collect(),
        bytes_written: 0,
        output_size: 0,
        bytes_shared: 0,
        bytes_copied: 0,
        shards_rewritten: None,
        shards_copied: None,
        map: None,
        dropped: Vec::new(),
        config_changes: Vec::new(),
        warnings,
    }
}

/// The fidelity of every change with images, or the reason it is not scored.
fn score(report: &mut ResizeReport, images: &[(&dyn Change, Option<Images>)], job: &ResizeJob) {
    for (report_table, (change, images)) in report.tables.iter_mut().zip(images) {
        match images {
            Some(Images {
                unscored: Some(why),
                ..
            }) => report
                .warnings
                .push(format!("\"{}\": fidelity not scored: {why}", change.name())),
            Some(images) => {
                let (fidelity, notes) = fidelity_of(*change, images, job);
                report_table.fidelity = fidelity;
                report.warnings.extend(notes);
            }
            // A video table: the maps are drawn on 2-D grids (a patch kernel has no positions).
            None if change.absolute().is_some() => report.warnings.push(format!(
                "\"{}\": fidelity not scored: the similarity maps are drawn on 2-D grids",
                change.name()
            )),
            None => {}
        }
    }
}

/// The output entries: every tensor the selection keeps, under its output name, with its new
/// shape and bytes where it changed.
fn output_of<'a>(
    output_path: &Path,
    source: &'a Source,
    plan: &Plan,
    selection: &selection::Selection,
    new_data: &'a HashMap<String, Vec<u8>>,
) -> Output<'a> {
    let drops: HashSet<&str> = plan.drops().into_iter().collect();
    let shapes = plan.new_shapes();
    Output {
        source: source.reader(),
        entries: source
            .entries()
            .iter()
            .filter(|t| !drops.contains(t.name.as_str()))
            .filter_map(|t| {
                Some(OutEntry {
                    name: selection::out_name(&t.name, selection)?,
                    shape: shapes
                        .get(t.name.as_str())
                        .copied()
                        .unwrap_or(&t.shape)
                        .to_vec(),
                    origin: t,
                    new: new_data.get(&t.name).map(Vec::as_slice),
                })
            })
            .collect(),
        provenance: provenance(plan),
        edits: Vec::new(),
        left_out: drops.iter().map(|n| n.to_string()).collect(),
        block: write::share::block_size_at(output_path),
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

/// The configuration files of a directory output, updated to the new size (their new
/// contents); for a file output, a warning when configuration files beside the input record the
/// old size.
fn update_configs(
    source: &Source,
    job: &ResizeJob,
    format: Format,
    plan: &Plan,
    report: &mut ResizeReport,
) -> Result<Vec<(PathBuf, Vec<u8>)>> {
    let set = source
        .downcast::<ShardedSet>()
        .filter(|_| format == Format::ShardedSafetensors);
    let files = match (model_dir_output(source, job)?, set) {
        (Some(md), _) => md.others.clone(),
        (None, Some(set)) => set.other_files()?,
        (None, None) => {
            let beside = match source.directory() {
                Some(md) => md.json_files().cloned().collect(),
                None => match source.downcast::<ShardedSet>() {
                    Some(set) => set
                        .other_files()?
                        .into_iter()
                        .filter(|p| p.extension().is_some_and(|e| e == "json"))
                        .collect(),
                    None => directory::configs_beside(&job.input),
                },
            };
            if !beside.is_empty() {
                let names: Vec<String> = beside.iter().map(|p| p.display().to_string()).collect();
                report.warnings.push(format!(
                    "{} may record the old input size and is not changed by a file output; resize the model's directory instead (posgrid resize DIR -o OUTDIR ...) to update it",
                    names.join(", ")
                ));
            }
            return Ok(Vec::new());
        }
    };
    let updates = config_files::updates(&files, plan, &job.request, job.keep_config)?;
    report.warnings.extend(updates.warnings);
    report.config_changes = updates.changes;
    Ok(updates.edits)
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
    let written = match model_dir_output(source, job)? {
        Some(md) => directory::write_dir(md, writer, output, &dest, progress.as_mut())?,
        None => writer.write(output, &dest, progress.as_mut())?,
    };
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
    // What the kernel did, read back from the output's extent map.
    report.bytes_shared = write::share::shared_bytes_at(&job.output).min(written.size);
    report.bytes_copied = written.size - report.bytes_shared;
    if figure.is_some() {
        report.map = job.map.clone();
    }
    Ok(())
}

/// What the memory guard leaves for the maps and the fidelity score of a table once its
/// resize is paid for.
fn fidelity_budget(change: &dyn Change, job: &ResizeJob) -> similarity::Budget {
    similarity::Budget::memory(
        job.request
            .memory_limit
            .saturating_sub(change.needed_bytes()),
    )
}

/// The fidelity score of one change (`None` when undefined or over the guard) and the
/// warnings that explain it.
fn fidelity_of(
    change: &dyn Change,
    images: &Images,
    job: &ResizeJob,
) -> (Option<f64>, Vec<String>) {
    let grid = |rows, [h, w]: [usize; 2]| Grid {
        rows,
        h,
        w,
        d: images.width,
    };
    let name = change.name();
    match similarity::score(
        grid(&images.before, images.from),
        grid(&images.after, images.to),
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
    let old_shapes: Vec<&[usize]> = plan.changes.iter().map(|c| c.shape()).collect();
    let stale: Vec<&str> = output
        .entries
        .iter()
        .filter(|e| e.new.is_none() && old_shapes.contains(&e.origin.shape.as_slice()))
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
    let model_dir = model_dir_output(source, job)?;
    match (format, set, model_dir) {
        (_, _, Some(md)) => write::check_destination_model_dir(md, &job.output, job.force)?,
        (Format::ShardedSafetensors, Some(set), _) => {
            write::check_destination_dir(set.dir(), &job.output, job.force)?
        }
        _ => write::check_destination(mode_source(job, source), &job.output, job.force)?,
    }
    // A set or a directory converted to one file must not land among the files it is read from.
    if let Some(dir) = set
        .map(ShardedSet::dir)
        .or(source.directory().map(|d| d.dir.as_path()))
    {
        write::outside_set(&job.output, dir)?;
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
    if let Some(dir) = set
        .map(ShardedSet::dir)
        .or(source.directory().map(|d| d.dir.as_path()))
    {
        if write::inside(png, dir) {
            return clash("is inside the input directory");
        }
    }
    let dir_output = model_dir.is_some() || (format == Format::ShardedSafetensors && set.is_some());
    if dir_output && write::inside(png, &job.output) {
        return clash("is inside the output directory, which is written as a whole");
    }
    Ok(())
}

/// The input file whose permission bits limit the outputs' (a set's index for a set, the
/// weights file of a model directory).
fn mode_source<'a>(job: &'a ResizeJob, source: &'a Source) -> &'a Path {
    match (source.downcast::<ShardedSet>(), source.directory()) {
        (Some(set), _) => set.index_path(),
        (None, Some(md)) => &md.weights,
        (None, None) => &job.input,
    }
}

/// The model directory whose output is a directory: a model directory given as input, unless
/// OUT names a file of a container (then the weights alone are written there). A directory
/// output keeps its weights' container.
fn model_dir_output<'a>(source: &'a Source, job: &ResizeJob) -> Result<Option<&'a ModelDir>> {
    let Some(md) = source.directory() else {
        return Ok(None);
    };
    if Format::from_extension(&job.output).is_some() {
        return Ok(None);
    }
    match job.format {
        Some(f) if f != source.format() => Err(Error::Usage(format!(
            "a model directory's output keeps its weights' container ({}); to convert, name an output file such as {}",
            source.format().name(),
            job.output.with_extension(f.extension()).display()
        ))),
        _ => Ok(Some(md)),
    }
}

/// The before/after similarity maps of the first table as PNG bytes, if asked for. Drawn in
/// memory before anything is written, so the figure and OUT can be committed together.
fn draw_map(
    job: &ResizeJob,
    images: &[(&dyn Change, Option<Images>)],
    warnings: &mut Vec<String>,
) -> Result<Option<Vec<u8>>> {
    let Some(_) = &job.map else {
        return Ok(None);
    };
    // The first absolute table that was resampled; else the first window-relative table.
    let Some((change, table, images)) = images.iter().find_map(|(c, i)| {
        let table = c.absolute()?;
        Some((*c, table, i.as_ref()?))
    }) else {
        return Ok(offsets_figure(images));
    };
    let rows = GridRows::borrowed;
    let mut after_table = table.table.clone();
    after_table.grid = table.to;
    let drawn = figure::figure(
        &job.input,
        &rows(&table.table, &images.before),
        Some(&rows(&after_table, &images.after)),
        job.refs,
        fidelity_budget(change, job),
    )?;
    warnings.extend(drawn.notes.iter().cloned());
    Ok(Some(drawn.png))
}

/// The per-head offset images of the first window-relative table, before and after.
fn offsets_figure(images: &[(&dyn Change, Option<Images>)]) -> Option<Vec<u8>> {
    let (change, images) = images.iter().find_map(|(c, i)| {
        (c.report().kind == Kind::WindowRelative).then_some((*c, i.as_ref()?))
    })?;
    let heads = images.width;
    fn grid(values: &[f32], [h, w]: [usize; 2], heads: usize) -> OffsetGrid<'_> {
        OffsetGrid {
            values,
            h,
            w,
            heads,
        }
    }
    let r = change.report();
    let title = format!(
        "{}  |  window {} -> {}  |  {}",
        r.name,
        r.from
            .iter()
            .map(|n| n.to_string())
            .collect::<Vec<_>>()
            .join("x"),
        r.to.iter()
            .map(|n| n.to_string())
            .collect::<Vec<_>>()
            .join("x"),
        r.dtype
    );
    let shown = images.width.min(offsets::MAX_HEADS);
    let subtitle = format!(
        "bias against the offset between two positions (zero offset in the middle); {shown} of {} heads, each on its own scale",
        images.width
    );
    let canvas = offsets::draw(
        &title,
        &subtitle,
        &grid(&images.before, images.from, heads),
        &grid(&images.after, images.to, heads),
    );
    Some(canvas.png())
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

/// The new bytes of every rewritten tensor, by name, and each change's images before and
/// after for the similarity measures.
struct Outcome<'a> {
    bytes: HashMap<String, Vec<u8>>,
    images: Vec<(&'a dyn Change, Option<Images>)>,
}

fn compute<'a>(
    ckpt: &dyn TensorSource,
    plan: &'a Plan,
    allow_nonfinite: bool,
) -> Result<Outcome<'a>> {
    let mut out = Outcome {
        bytes: HashMap::new(),
        images: Vec::new(),
    };
    for change in &plan.changes {
        let computed = change.compute(ckpt, allow_nonfinite)?;
        out.bytes.extend(computed.bytes);
        out.images.push((change.as_ref(), computed.images));
    }
    Ok(out)
}

/// Provenance: the version and, per table, the grids, slots and options. A writer whose
/// container holds metadata adds a record already in its source under `previous`.
pub(crate) fn provenance(plan: &Plan) -> serde_json::Value {
    let tables: Vec<serde_json::Value> = plan.changes.iter().map(|c| c.provenance()).collect();
    serde_json::json!({
        "tool": "posgrid",
        "version": env!("CARGO_PKG_VERSION"),
        "tables": tables,
        "companions": plan.companions(),
    })
}
