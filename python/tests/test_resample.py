"""resample on numpy arrays: against the committed golden file of the onnx reference evaluator
(fixtures/golden/make_resample_golden.py), a bilinear resize written here in numpy, the tables
the command line writes, and its own promises (layouts, class rows, dtypes, memory layouts,
threads)."""

import json
import threading
import time
from concurrent.futures import ThreadPoolExecutor

import numpy as np
import pytest
from safetensors import safe_open
from safetensors.numpy import load_file

import posgrid
from conftest import FIXTURES, KINDS, cli, smooth_table

GOLDEN = FIXTURES / "golden" / "resample_cases.safetensors"


def golden_cases():
    with safe_open(str(GOLDEN), framework="numpy") as f:
        cases = json.loads(f.metadata()["cases"])
    return cases, load_file(str(GOLDEN))


def test_every_golden_case_of_the_onnx_reference():
    cases, tensors = golden_cases()
    assert len(cases) >= 150
    for case in cases:
        table = tensors[case["name"] + ".input"]  # [H, W, D]
        expected = tensors[case["name"] + ".output"]
        options = dict(
            kernel={"linear": "bilinear", "cubic": "bicubic", "nearest": "nearest"}[case["mode"]],
            coords=case["coordinate_transformation_mode"].replace("_", "-"),
            edges="renormalize" if case["exclude_outside"] else "clamp",
            antialias="on" if case["antialias"] else "off",
            cubic_a=case["cubic_coeff_a"],
        )
        got = posgrid.resample(table[None], tuple(case["to"]), **options)
        assert got.shape == (1, *expected.shape) and got.dtype == np.float32
        scale = np.abs(expected).max()
        # Tolerance of the Rust golden test: 1e-5 of the largest |value|.
        np.testing.assert_allclose(got[0], expected, rtol=0, atol=1e-5 * scale, err_msg=case["name"])


def numpy_bilinear(grid: np.ndarray, out: tuple) -> np.ndarray:
    """Half-pixel bilinear resize of [H, W, D], out-of-range taps clamped to the border (ONNX
    linear, exclude_outside 0, no antialias), written here from the definition."""
    for axis, size in enumerate(out):
        n = grid.shape[axis]
        x = (np.arange(size) + 0.5) * n / size - 0.5
        lo = np.floor(x).astype(int)
        frac = x - lo
        a = np.take(grid, np.clip(lo, 0, n - 1), axis=axis)
        b = np.take(grid, np.clip(lo + 1, 0, n - 1), axis=axis)
        shape = [1, 1, 1]
        shape[axis] = size
        grid = a * (1 - frac.reshape(shape)) + b * frac.reshape(shape)
    return grid


@pytest.mark.parametrize("to", [(9, 13), (4, 3), (12, 5)])
def test_bilinear_against_numpy(to):
    table = np.random.default_rng(3).standard_normal((1, 1 + 7 * 6, 5))
    got = posgrid.resample(table, to, slots=1, source_grid=(7, 6), kernel="bilinear", antialias="off")
    assert got.dtype == np.float64
    np.testing.assert_array_equal(got[0, :1], table[0, :1])
    expected = numpy_bilinear(table[0, 1:].reshape(7, 6, 5), to).reshape(-1, 5)
    np.testing.assert_allclose(got[0, 1:], expected, rtol=0, atol=1e-12)


def test_the_tables_the_command_line_writes(tmp_path):
    # The same engine behind both: the command line's video and window tables, bit for bit.
    out = tmp_path / "video.safetensors"
    assert cli("resize", KINDS / "video.safetensors", "-o", out, "--source-grid", "8x14x14",
               "--grid", "8x16x16").code == 0
    before, after = load_file(str(KINDS / "video.safetensors")), load_file(str(out))
    names = [n for n in before if n.endswith("pos_embed")]
    assert names
    for name in names:
        slots = before[name].shape[1] - 8 * 14 * 14
        got = posgrid.resample(before[name], (8, 16, 16), slots=slots, source_grid=(8, 14, 14))
        np.testing.assert_array_equal(got, after[name], err_msg=name)

    out = tmp_path / "window.safetensors"
    assert cli("resize", KINDS / "window_stages.safetensors", "-o", out, "--image", "96",
               "--window", "12").code == 0
    before, after = load_file(str(KINDS / "window_stages.safetensors")), load_file(str(out))
    name = "layers.0.blocks.0.attn.relative_position_bias_table"
    got = posgrid.resample(before[name], 23, source_grid=(13, 13))
    np.testing.assert_array_equal(got, after[name])


def test_layouts_agree_and_class_rows_are_kept_exactly():
    table = smooth_table(6, 8, 7, slots=2)
    batch = posgrid.resample(table, (9, 12), slots=2, source_grid=(6, 8))
    rows = posgrid.resample(table[0], (9, 12), slots=2, source_grid="6x8")
    grid = posgrid.resample(table[:, 2:].reshape(1, 6, 8, 7), (9, 12))
    assert batch.shape == (1, 2 + 108, 7) and rows.shape == (110, 7) and grid.shape == (1, 9, 12, 7)
    np.testing.assert_array_equal(batch[0], rows)
    np.testing.assert_array_equal(batch[0, 2:].reshape(9, 12, 7), grid[0])
    np.testing.assert_array_equal(batch[0, :2], table[0, :2])


def test_a_square_grid_is_inferred_and_float64_computes_in_float64():
    table = smooth_table(5, 5, 3).astype(np.float64)
    got = posgrid.resample(table, 8, slots=1)
    assert got.shape == (1, 65, 3) and got.dtype == np.float64
    single = posgrid.resample(table.astype(np.float32), 8, slots=1)
    np.testing.assert_allclose(got, single, rtol=0, atol=1e-5)
    assert not np.array_equal(got, single.astype(np.float64))


def test_the_same_grid_is_an_exact_copy_that_shares_nothing():
    table = smooth_table(4, 4, 6)
    got = posgrid.resample(table, 4, slots=1)
    np.testing.assert_array_equal(got, table)
    assert not np.shares_memory(got, table)
    got[0, 0, 0] += 1
    assert got[0, 0, 0] != table[0, 0, 0]


def test_non_contiguous_arrays_read_in_logical_order():
    base = smooth_table(7, 7, 16, slots=1)
    reference = posgrid.resample(np.ascontiguousarray(base[:, :, ::2]), 10, slots=1)
    strided = base[:, :, ::2]
    assert not strided.flags.c_contiguous
    np.testing.assert_array_equal(posgrid.resample(strided, 10, slots=1), reference)
    fortran = np.asfortranarray(base[0, :, ::2])
    assert not fortran.flags.c_contiguous
    np.testing.assert_array_equal(posgrid.resample(fortran, 10, slots=1), reference[0])
    reversed_rows = np.ascontiguousarray(base[0, :, ::2][::-1])[::-1]
    assert reversed_rows.strides[0] < 0
    np.testing.assert_array_equal(posgrid.resample(reversed_rows, 10, slots=1), reference[0])


def test_read_only_and_memory_mapped_arrays(tmp_path):
    table = smooth_table(6, 6, 4)
    expected = posgrid.resample(table, 9, slots=1)
    frozen = table.copy()
    frozen.setflags(write=False)
    np.testing.assert_array_equal(posgrid.resample(frozen, 9, slots=1), expected)
    path = tmp_path / "table.npy"
    np.save(path, table)
    mapped = np.load(path, mmap_mode="r")
    assert not mapped.flags.writeable
    np.testing.assert_array_equal(posgrid.resample(mapped, 9, slots=1), expected)


def test_the_input_is_left_unchanged():
    table = smooth_table(6, 6, 4)
    copy = table.copy()
    posgrid.resample(table, 3, slots=1, kernel="area")
    np.testing.assert_array_equal(table, copy)


def test_threads_resample_side_by_side():
    tables = [smooth_table(12, 12, 32, seed=s) for s in range(8)]
    expected = [posgrid.resample(t, 20, slots=1) for t in tables]
    with ThreadPoolExecutor(max_workers=4) as pool:
        got = list(pool.map(lambda t: posgrid.resample(t, 20, slots=1), tables * 4))
    for i, g in enumerate(got):
        np.testing.assert_array_equal(g, expected[i % len(tables)])


def test_the_gil_is_released_while_the_engine_computes():
    # While one thread resamples a large table, the main thread keeps running Python code:
    # it must record iterations in the middle half of the call, which it could not do if the
    # call held the GIL throughout. The call must last well over the interpreter's 5 ms switch
    # interval for that to tell; on a machine fast enough (or with cores enough) to finish the
    # larger table sooner, there is nothing to see and the test says so.
    table = np.random.default_rng(0).standard_normal((1, 1 + 48 * 48, 384)).astype(np.float32)
    for side in (256, 384):
        start, end, ticks = resample_beside_python(table, side)
        if end - start > 0.05:
            quarter = (end - start) / 4
            middle = [t for t in ticks if start + quarter < t < end - quarter]
            assert middle, f"no Python ran during a {end - start:.3f} s call"
            return
    pytest.skip(f"a {side}x{side} resample took {end - start:.3f} s: too short to tell")


def resample_beside_python(table, side):
    """Resample `table` to `side` in a thread while this one counts; the call's start and end
    and the times this thread ran."""
    span = {}

    def work():
        span["start"] = time.perf_counter()
        posgrid.resample(table, side, slots=1, kernel="lanczos3")
        span["end"] = time.perf_counter()

    worker = threading.Thread(target=work)
    ticks = []
    worker.start()
    while worker.is_alive():
        ticks.append(time.perf_counter())
    worker.join()
    return span["start"], span["end"], ticks
