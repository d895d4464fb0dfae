"""Check a resized PyTorch checkpoint against its input with the tensor framework itself.

Not part of CI (it needs torch). Run it in the venv of fixtures/torch/requirements.txt:

    python scripts/torch_roundtrip.py INPUT OUTPUT [INPUT OUTPUT ...] [--grid H W] [--slots N]
    python scripts/torch_roundtrip.py --self-test

Both files are loaded with torch.load(weights_only=True), the framework's safe mode (an OUTPUT
ending in .safetensors with the safetensors library), and both object trees are walked:
- every entry that is not a resized table must be equal: tensors by torch.equal and dtype (and
  type and requires_grad for .pth outputs), other values by ==, containers by type, length,
  key order and the state dict's `_metadata`;
- a resized table (same width, other row count) must keep its class rows bit for bit, and its
  grid rows must match torch.nn.functional.interpolate of the input grid to the new grid
  (bicubic, align_corners=False, no antialias unless told), computed here: the largest
  difference is printed; allowed is 1e-5 x max|x| for F32, 1e-12 for F64, one rounding step of
  the dtype for F16/BF16 (posgrid computes in f32 and rounds);
- a position-id companion (integers 0..N-1) must become 0..N'-1.
Training checkpoints holding an argparse namespace or numpy scalars need those globals allowed
in the safe mode, by name (e.g. fixtures/torch/training.pth: --safe-global argparse.Namespace
--safe-global numpy._core.multiarray.scalar --safe-global numpy.dtype
--safe-global numpy.dtypes.Float64DType); the script says which one the framework refused.
A .safetensors OUTPUT is compared against the one dict of the input that it matches (keys equal
after stripping one common prefix, such as `module.`). An input entry missing from the output
fails the check unless --allow-dropped is given.

One line per pair, "ok ..." or "FAIL ...", after indented details; exit status 1 if any pair
failed, 2 if a file could not be loaded.
"""

import argparse
import copy
import importlib
import math
import pathlib
import re
import sys
import tempfile

import torch
import torch.nn.functional as F

TOLERANCE = {torch.float32: 1e-5, torch.float64: 1e-12, torch.float16: 2.0**-10, torch.bfloat16: 2.0**-7}


# ---------------------------------------------------------------------------------------------
# Loading and walking.


def allow_globals(names):
    """--safe-global module.Name: extends the safe mode's allow-list by those named, on request."""
    found = []
    for name in names:
        module, _, attr = name.rpartition(".")
        found.append(getattr(importlib.import_module(module), attr))
    torch.serialization.add_safe_globals(found)


def load(path):
    if str(path).endswith(".safetensors"):
        from safetensors.torch import load_file

        return load_file(str(path))
    return torch.load(path, weights_only=True, map_location="cpu")


def walk(obj, path=()):
    """Yields (path, node) for every node; containers come before their children."""
    yield path, obj
    if isinstance(obj, dict):
        for key, value in obj.items():
            yield from walk(value, path + (key,))
    elif isinstance(obj, (list, tuple)):
        for index, value in enumerate(obj):
            yield from walk(value, path + (index,))


def show(path):
    return "/".join(k if isinstance(k, str) else repr(k) for k in path) or "<root>"


def tensor_dicts(tree):
    """Every dict in the tree that holds tensors directly, with its path."""
    for path, node in walk(tree):
        if isinstance(node, dict) and any(isinstance(v, torch.Tensor) for v in node.values()):
            yield path, node


def match_flat(tree, flat):
    """The input dict (and name prefix) a flat output was taken from, or None."""
    wanted = set(flat)
    for path, node in tensor_dicts(tree):
        keys = [k for k, v in node.items() if isinstance(v, torch.Tensor) and isinstance(k, str)]
        prefixes = {""} | {k[: i + 1] for k in keys[:1] for i, c in enumerate(k) if c == "."}
        for prefix in sorted(prefixes, key=len):
            if all(k.startswith(prefix) for k in keys) and {k[len(prefix) :] for k in keys} == wanted:
                return path, prefix, {k[len(prefix) :]: node[k] for k in keys}
    return None


# ---------------------------------------------------------------------------------------------
# Resized tables.


def is_square(n):
    return n >= 0 and math.isqrt(n) ** 2 == n


def grids_of(rows_in, rows_out, opts):
    """(slots, source grid, target grid) for a [.., N, D] table, from flags or inferred as the
    fewest class slots that leave square grids on both sides."""
    if opts.slots is not None:
        slots_choices = [opts.slots]
    elif opts.grid is not None:
        slots_choices = [rows_out - opts.grid[0] * opts.grid[1]]
    else:
        slots_choices = [s for s in range(0, 9) if is_square(rows_in - s) and is_square(rows_out - s)][:1]
    for slots in slots_choices:
        target = tuple(opts.grid) if opts.grid else (math.isqrt(rows_out - slots),) * 2
        source = tuple(opts.source_grid) if opts.source_grid else (math.isqrt(rows_in - slots),) * 2
        if slots >= 0 and source[0] * source[1] == rows_in - slots and target[0] * target[1] == rows_out - slots:
            return slots, source, target
    return None


def interpolate_grid(grid, target, opts):
    """[h, w, D] -> [H, W, D] with the framework's interpolate; f64 stays f64, the rest in f32."""
    work = torch.float64 if grid.dtype == torch.float64 else torch.float32
    nchw = grid.to(work).permute(2, 0, 1)[None]
    out = F.interpolate(nchw, size=target, mode=opts.mode, align_corners=False, antialias=opts.antialias)
    return out[0].permute(1, 2, 0).to(grid.dtype)


def check_table(name, a, b, opts):
    """Returns (problems, detail) for a table whose row count changed."""
    if a.dim() == 4:  # [1, H, W, D]: all rows are grid rows
        slots, rows_a, rows_b = 0, a.reshape(-1, a.shape[-1]), b.reshape(-1, b.shape[-1])
        source, target = tuple(a.shape[1:3]), tuple(b.shape[1:3])
    else:
        rows_a, rows_b = a.reshape(-1, a.shape[-1]), b.reshape(-1, b.shape[-1])
        found = grids_of(rows_a.shape[0], rows_b.shape[0], opts)
        if found is None:
            return [f"{name}: cannot tell slots and grids from {list(a.shape)} -> {list(b.shape)} (use --slots/--grid)"], ""
        slots, source, target = found
    problems = []
    if not torch.equal(rows_a[:slots], rows_b[:slots]):
        problems.append(f"{name}: class rows differ")
    expected = interpolate_grid(rows_a[slots:].reshape(*source, -1), target, opts).reshape(-1, a.shape[-1])
    diff = (expected.double() - rows_b[slots:].double()).abs().max().item() if expected.numel() else 0.0
    scale = rows_a[slots:].double().abs().max().item() if rows_a[slots:].numel() else 0.0
    allowed = TOLERANCE.get(a.dtype, 0.0) * max(scale, 1e-30)
    detail = f"{name}: {slots} slot(s), {source[0]}x{source[1]} -> {target[0]}x{target[1]}, max|diff| {diff:.3e} (allowed {allowed:.3e})"
    if not diff <= allowed:
        problems.append(f"{name}: grid rows differ from interpolate by {diff:.3e} > {allowed:.3e}")
    return problems, detail


def is_position_ids(a):
    return not a.is_floating_point() and a.dtype != torch.bool and torch.equal(a.reshape(-1), torch.arange(a.numel(), dtype=a.dtype))


# ---------------------------------------------------------------------------------------------
# Comparing two trees.


def same_value(a, b):
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return type(a) is type(b) and a == b


def compare_tensor(name, a, b, strict_types, opts, report):
    if a.dtype != b.dtype:
        report.fail(f"{name}: dtype {a.dtype} -> {b.dtype}")
    elif a.shape == b.shape:
        if not torch.equal(a, b):
            report.fail(f"{name}: values differ")
        report.equal += 1
    elif a.is_floating_point() and a.dim() >= 2 and a.shape[-1] == b.shape[-1]:
        problems, detail = check_table(name, a, b, opts)
        report.detail(detail)
        for problem in problems:
            report.fail(problem)
        report.resized += 1
    elif is_position_ids(a) and b.dim() == a.dim():
        if not is_position_ids(b):
            report.fail(f"{name}: position ids {list(a.shape)} -> {list(b.shape)} are not 0..N-1")
        report.detail(f"{name}: position ids {list(a.shape)} -> {list(b.shape)}")
        report.resized += 1
    else:
        report.fail(f"{name}: shape {list(a.shape)} -> {list(b.shape)}, not a table")
    if strict_types and (type(a) is not type(b) or a.requires_grad != b.requires_grad):
        report.fail(f"{name}: {type(a).__name__}(requires_grad={a.requires_grad}) -> {type(b).__name__}(requires_grad={b.requires_grad})")


def compare_container(name, a, b, opts, report):
    kept = [k for k in a if k in b] if isinstance(a, dict) and isinstance(b, dict) and opts.allow_dropped else list(a)
    if type(a) is not type(b) or len(kept) != len(b):
        report.fail(f"{name}: {type(a).__name__} of {len(a)} -> {type(b).__name__} of {len(b)}")
    elif isinstance(a, dict) and kept != list(b):
        report.fail(f"{name}: keys or their order differ")
    if getattr(a, "_metadata", None) != getattr(b, "_metadata", None):
        report.fail(f"{name}: state dict _metadata differs")


def compare_trees(tree_in, tree_out, strict_types, opts, report):
    nodes_out = dict(walk(tree_out))
    for path, a in walk(tree_in):
        name = show(path)
        if path not in nodes_out:
            if path[:-1] in nodes_out and not isinstance(nodes_out[path[:-1]], torch.Tensor):
                report.dropped.append(name)
            continue
        b = nodes_out[path]
        if isinstance(a, torch.Tensor) and isinstance(b, torch.Tensor):
            compare_tensor(name, a, b, strict_types, opts, report)
        elif isinstance(a, (dict, list, tuple)) and strict_types:
            compare_container(name, a, b, opts, report)
        elif isinstance(a, (dict, list, tuple)) or isinstance(b, (dict, list, tuple)):
            if type(a) is not type(b) and not (isinstance(a, dict) and isinstance(b, dict)):
                report.fail(f"{name}: {type(a).__name__} -> {type(b).__name__}")
        elif not same_value(a, b):
            report.fail(f"{name}: {a!r} -> {b!r}")
        else:
            report.other += 1
    paths_in = {p for p, _ in walk(tree_in)}
    for path in nodes_out:
        if path not in paths_in:
            report.fail(f"{show(path)}: not in the input")


class Report:
    def __init__(self):
        self.failures, self.details, self.dropped = [], [], []
        self.equal = self.resized = self.other = 0

    def fail(self, text):
        self.failures.append(text)

    def detail(self, text):
        if text:
            self.details.append(text)


def check_pair(path_in, path_out, opts):
    """Prints the details and one summary line; returns 0 ok, 1 failed, 2 unreadable."""
    try:
        tree_in, tree_out = load(path_in), load(path_out)
    except Exception as err:  # the framework's own message is the useful part
        message = re.sub(r"\x1b\[[0-9;]*m", "", str(err))
        print(f"FAIL {path_in} -> {path_out}: cannot load: {type(err).__name__}: {message.strip().splitlines()[0]}")
        for name in re.findall(r"Unsupported global: GLOBAL ([\w.]+)", message):
            print(f"  the safe mode refused {name}; if you trust the file, retry with --safe-global {name}")
        return 2
    report = Report()
    flat_output = str(path_out).endswith(".safetensors")
    # A PyTorch output holding only a state dict of the input (posgrid's --model-only) is
    # compared like a flat one, against the dict it came from.
    model_only = not flat_output and opts.model_only
    if flat_output or model_only:
        match = match_flat(tree_in, tree_out)
        if match is None:
            print(f"FAIL {path_in} -> {path_out}: no dict of the input has the output's {len(tree_out)} names")
            return 1
        where, prefix, tree_in = match
        report.detail(f"compared with input dict {show(where)}" + (f", prefix {prefix!r} stripped" if prefix else ""))
    compare_trees(tree_in, tree_out, not flat_output and not model_only, opts, report)
    if report.dropped:
        shown = ", ".join(report.dropped[:6]) + (" ..." if len(report.dropped) > 6 else "")
        (report.detail if opts.allow_dropped else report.fail)(f"dropped from the output: {shown}")
    for line in report.details + report.failures:
        print(f"  {line}")
    counts = f"{report.equal} tensors equal, {report.resized} resized, {report.other} other values equal"
    if report.failures:
        print(f"FAIL {path_in} -> {path_out}: {len(report.failures)} problem(s); {counts}")
        return 1
    print(f"ok {path_in} -> {path_out}: {counts}")
    return 0


# ---------------------------------------------------------------------------------------------
# Self-test: pairs made here with the framework, some right, some wrong on purpose.


def resized_table(table, target, mode="bicubic", slots=1):
    rows = table.reshape(-1, table.shape[-1])
    side = math.isqrt(rows.shape[0] - slots)
    opts = argparse.Namespace(mode=mode, antialias=False)
    grid = interpolate_grid(rows[slots:].reshape(side, side, -1), target, opts)
    return torch.cat([rows[:slots], grid.reshape(-1, rows.shape[-1])])[None]


def self_test_cases(fixtures, tmp):
    """(name, input, output, extra flags, expected to pass)."""
    from safetensors.torch import save_file

    plain = torch.load(fixtures / "plain.pth", weights_only=True)
    cases = []

    def case(name, source, obj, passes, flags=(), suffix=".pth"):
        out = tmp / f"{name}{suffix}"
        save_file(obj, str(out)) if suffix == ".safetensors" else torch.save(obj, out)
        cases.append((name, source, out, list(flags), passes))

    def with_table(sd, target=(6, 6), **kw):
        sd = copy.copy(sd)  # keeps the OrderedDict type, key order and _metadata
        sd["pos_embed"] = resized_table(sd["pos_embed"], target, **kw)
        return sd

    case("enlarged", fixtures / "plain.pth", with_table(plain), True)
    case("shrunk", fixtures / "plain.pth", with_table(plain, (3, 3)), True, ["--grid", "3", "3"])
    case("wide", fixtures / "plain.pth", with_table(plain, (4, 7)), True, ["--grid", "4", "7"])
    near = with_table(plain)  # computed in f64, then rounded: a last-bit difference must pass
    rows = plain["pos_embed"][0].double()
    grid = interpolate_grid(rows[1:].reshape(4, 4, 8), (6, 6), argparse.Namespace(mode="bicubic", antialias=False))
    near["pos_embed"] = torch.cat([rows[:1], grid.reshape(36, 8)]).float()[None]
    case("rounding", fixtures / "plain.pth", near, True)
    wrapped = {"model": with_table(plain)}
    case("wrapped", fixtures / "wrapped.pth", wrapped, True)
    case("flat", fixtures / "wrapped.pth", with_table(plain), True, suffix=".safetensors")
    both = torch.load(fixtures / "teacher_student.pth", weights_only=True)
    key = "module.backbone.pos_embed"
    for part in both.values():
        part[key] = resized_table(part[key], (6, 6))  # in place: order and _metadata kept
    case("teacher_student", fixtures / "teacher_student.pth", both, True)
    bf16 = torch.load(fixtures / "bf16.pth", weights_only=True)
    case("bf16", fixtures / "bf16.pth", with_table(bf16), True)
    ids = copy.copy(plain)
    ids["position_ids"] = torch.arange(17)[None]
    src_ids = tmp / "with_ids.pth"
    torch.save(ids, src_ids)
    resized_ids = with_table(ids)
    resized_ids["position_ids"] = torch.arange(37)[None]
    case("position_ids", src_ids, resized_ids, True)
    training = torch.load(fixtures / "training.pth", weights_only=False)
    training["model"] = with_table(training["model"])
    numpy_globals = ["argparse.Namespace", "numpy._core.multiarray.scalar", "numpy.dtype", "numpy.dtypes.Float64DType"]
    case("training", fixtures / "training.pth", training, True, [f"--safe-global={g}" for g in numpy_globals])
    model_only = {"model": training["model"]}
    case("model_only_refused", fixtures / "training.pth", model_only, False, [f"--safe-global={g}" for g in numpy_globals])
    case("model_only_allowed", fixtures / "training.pth", model_only, True, [f"--safe-global={g}" for g in numpy_globals] + ["--allow-dropped"])

    # Wrong on purpose: each must fail.
    bad = with_table(plain)
    bad["pos_embed"][0, 0, 0] += 1e-3
    case("bad_class_row", fixtures / "plain.pth", bad, False)
    case("bad_kernel", fixtures / "plain.pth", with_table(plain, mode="bilinear"), False)
    bad = with_table(plain)
    grid = bad["pos_embed"][0, 1:].reshape(6, 6, 8).transpose(0, 1).reshape(36, 8)  # column-major
    bad["pos_embed"] = torch.cat([bad["pos_embed"][0, :1], grid])[None]
    case("bad_grid_order", fixtures / "plain.pth", bad, False)
    bad = with_table(plain)
    bad["pos_embed"][0, 20, 3] += 1e-4
    case("bad_one_value", fixtures / "plain.pth", bad, False)
    bad = with_table(plain)
    bad["head.bias"] = bad["head.bias"] + 1e-6
    case("bad_other_tensor", fixtures / "plain.pth", bad, False)
    bad = with_table(plain)
    bad["head.weight"] = bad["head.weight"].double()
    case("bad_dtype", fixtures / "plain.pth", bad, False)
    bad = with_table(plain)
    del bad["head.bias"]
    case("bad_missing", fixtures / "plain.pth", bad, False)
    bad = with_table(plain)
    bad.move_to_end("pos_embed")
    case("bad_order", fixtures / "plain.pth", bad, False)
    bad = copy.copy(training)
    bad["epoch"] = 8
    case("bad_epoch", fixtures / "training.pth", bad, False, [f"--safe-global={g}" for g in numpy_globals])
    bad = copy.deepcopy(both)
    bad["student"][key] = bad["student"][key] * 1.0001
    case("bad_student", fixtures / "teacher_student.pth", bad, False)
    return cases


def self_test(opts):
    fixtures = pathlib.Path(__file__).resolve().parent.parent / "fixtures" / "torch"
    wrong = 0
    with tempfile.TemporaryDirectory() as tmp:
        for name, source, out, flags, passes in self_test_cases(fixtures, pathlib.Path(tmp)):
            case_opts = parse_args([str(source), str(out), *flags])
            allow_globals(case_opts.safe_global)
            status = check_pair(source, out, case_opts)
            verdict = "as expected" if (status == 0) == passes else "UNEXPECTED"
            wrong += verdict != "as expected"
            print(f"-- self-test {name}: {'passed' if status == 0 else 'failed'} ({'should pass' if passes else 'should fail'}) {verdict}")
    print(f"self-test: {'all cases as expected' if not wrong else f'{wrong} case(s) unexpected'}")
    return 1 if wrong else 0


def parse_args(argv):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("files", nargs="*", help="INPUT OUTPUT pairs")
    parser.add_argument("--grid", nargs=2, type=int, metavar=("H", "W"), help="target grid (default: inferred)")
    parser.add_argument("--source-grid", nargs=2, type=int, metavar=("H", "W"), help="source grid (default: square)")
    parser.add_argument("--slots", type=int, help="class slots (default: fewest that leave square grids)")
    parser.add_argument("--mode", default="bicubic", choices=["bicubic", "bilinear"], help="interpolate mode")
    parser.add_argument("--antialias", action="store_true", help="interpolate with antialias=True")
    parser.add_argument("--allow-dropped", action="store_true", help="entries missing from OUTPUT are not a failure")
    parser.add_argument("--model-only", action="store_true", help="a .pth OUTPUT holds one state dict of INPUT (compare with that dict)")
    parser.add_argument("--safe-global", action="append", default=[], metavar="MODULE.NAME", help="allow this global in safe mode")
    parser.add_argument("--self-test", action="store_true", help="check the checker on pairs made here")
    opts = parser.parse_args(argv)
    if not opts.self_test and (not opts.files or len(opts.files) % 2):
        parser.error("give INPUT OUTPUT pairs")
    return opts


def main(argv):
    opts = parse_args(argv)
    if opts.self_test:
        return self_test(opts)
    allow_globals(opts.safe_global)
    statuses = [check_pair(a, b, opts) for a, b in zip(opts.files[::2], opts.files[1::2])]
    return max(statuses)


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
