"""Bad arguments raise TypeError (wrong type) or posgrid.UsageError, a ValueError (wrong
value), with a message that names the argument; none of them may bring the interpreter down."""

import math

import numpy as np
import pytest

import posgrid
from conftest import DEMO, smooth_table

TABLE = smooth_table(4, 4, 3)


@pytest.mark.parametrize(
    "table, words",
    [
        (TABLE.astype(np.int64), "int64"),
        (TABLE.astype(np.float16), "float16"),
        (TABLE.astype(np.complex64), "complex64"),
        (TABLE.astype(">f4"), ">f4"),
        (TABLE.astype(object), "object"),
        (TABLE.tolist(), "list"),
        (None, "NoneType"),
        ("pos_embed", "str"),
    ],
    ids=["int64", "float16", "complex", "big-endian", "object", "list", "none", "str"],
)
def test_wrong_table_types(table, words):
    with pytest.raises(TypeError, match=words):
        posgrid.resample(table, 8, slots=1)
    with pytest.raises(TypeError):
        posgrid.similarity(table, slots=1)


@pytest.mark.parametrize(
    "table, words",
    [
        (np.zeros(17, np.float32), r"shape \[17\]"),
        (np.zeros((1, 1, 1, 4, 4, 3), np.float32), "expected"),
        (np.zeros((2, 17, 3), np.float32), "leading axis of 2"),
        (np.zeros((3, 4, 4, 3), np.float32), "leading axis of 3"),
        (np.zeros((1, 18, 3), np.float32), "not a square grid"),
        (np.zeros((0, 3), np.float32), "at least 1"),
    ],
    ids=["rank-1", "rank-6", "batch", "batch-grid", "not-square", "empty"],
)
def test_wrong_shapes_are_value_errors(table, words):
    with pytest.raises(ValueError, match=words):
        posgrid.resample(table, 8, slots=1 if table.ndim == 3 and table.shape[0] == 1 else 0)


@pytest.mark.parametrize(
    "kwargs, error, words",
    [
        (dict(to=-1), ValueError, "to must be at least 1, got -1"),
        (dict(to=0), ValueError, "to must be at least 1, got 0"),
        (dict(to=(0, 5)), ValueError, r"to\[0\] must be at least 1"),
        (dict(to=(4, 4, 4)), ValueError, "to has 3 sides"),
        (dict(to=()), ValueError, "1 to 3 sides"),
        (dict(to="0x4"), ValueError, "at least 1"),
        (dict(to="big"), ValueError, "not HxW"),
        (dict(to=2.5), TypeError, "to must be"),
        (dict(to=True), TypeError, "not bool"),
        (dict(to=(4, "4")), TypeError, r"to\[1\] must be an integer"),
        (dict(to=2**70), ValueError, "too large"),
        (dict(slots=-1), ValueError, "slots must be at least 0, got -1"),
        (dict(slots=2.0), TypeError, "slots must be an integer"),
        (dict(slots=20), ValueError, "fewer than its 20 class slots"),
        (dict(source_grid=(-2, 8)), ValueError, "at least 1"),
        (dict(source_grid=(3, 5)), ValueError, "holds 15"),
        (dict(kernel="cubic"), ValueError, "kernel: unknown value"),
        (dict(kernel=3), TypeError, "kernel"),
        (dict(coords="asymmetric"), ValueError, "half-pixel, align-corners"),
        (dict(edges="wrap"), ValueError, "clamp, renormalize"),
        (dict(antialias=True), TypeError, "antialias"),
        (dict(cubic_a=math.inf), ValueError, "finite"),
        (dict(kernel="area", coords="align-corners"), ValueError, "half-pixel"),
        (dict(memory_limit=-5), ValueError, "memory_limit must be at least 0"),
        (dict(memory_limit="lots"), ValueError, "not a size"),
        (dict(to=100_000), posgrid.RefusedError, "guard"),
    ],
)
def test_bad_values_and_types(kwargs, error, words):
    args = dict(to=8, slots=1)
    args.update(kwargs)
    to = args.pop("to")
    with pytest.raises(error, match=words):
        posgrid.resample(TABLE, to, **args)


def test_value_errors_are_usage_errors_with_exit_code_2():
    with pytest.raises(posgrid.UsageError) as caught:
        posgrid.resample(TABLE, -3, slots=1)
    assert caught.value.exit_code == 2


def test_grid_shaped_tables_have_no_slots():
    grid = np.zeros((1, 4, 4, 3), np.float32)
    with pytest.raises(ValueError, match="no class slots"):
        posgrid.resample(grid, 8, slots=1)
    with pytest.raises(ValueError, match="source_grid is 4x5"):
        posgrid.resample(grid, 8, source_grid=(4, 5))


def test_numpy_integers_are_sizes():
    got = posgrid.resample(TABLE, np.int64(6), slots=np.int32(1), source_grid=(np.uint8(4), 4))
    assert got.shape == (1, 37, 3)


def test_refs_are_1_to_64():
    for refs in [0, 65, -1]:
        with pytest.raises(ValueError, match="refs"):
            posgrid.similarity(TABLE, slots=1, refs=refs)


def test_similarity_needs_a_plane():
    with pytest.raises(ValueError, match="2-D grid"):
        posgrid.similarity(np.zeros((27, 2), np.float32), source_grid=(3, 3, 3))


def test_bad_paths_and_file_options(tmp_path):
    with pytest.raises(TypeError, match="path must be a path"):
        posgrid.scan(42)
    with pytest.raises(TypeError, match="out must be a path"):
        posgrid.resize(DEMO, None, grid=16)
    with pytest.raises(ValueError, match="channels"):
        posgrid.scan(DEMO, channels="middle")
    with pytest.raises(ValueError, match="format"):
        posgrid.resize(DEMO, tmp_path / "o.bin", grid=16, format="onnx")
    with pytest.raises(ValueError, match="relative"):
        posgrid.resize(DEMO, tmp_path / "o.safetensors", grid=16, relative="spline")
    with pytest.raises(ValueError, match="patch must be at least 1"):
        posgrid.scan(DEMO, patch=0)
    with pytest.raises(ValueError, match="frames must be at least 1"):
        posgrid.resize(DEMO, tmp_path / "o.safetensors", grid=16, frames=-8)
    with pytest.raises(ValueError, match="image must have 2 sides"):
        posgrid.resize(DEMO, tmp_path / "o.safetensors", image=(8, 224, 224))
    with pytest.raises(TypeError, match="tensors must hold names"):
        posgrid.scan(DEMO, tensors=[1, 2])
    with pytest.raises(TypeError, match="unexpected keyword"):
        posgrid.resize(DEMO, tmp_path / "o.safetensors", grid=16, no_such_option=1)


def test_draw_maps_does_not_mix_arrays_and_files(tmp_path):
    png = tmp_path / "m.png"
    with pytest.raises(TypeError, match="after must be a checkpoint path"):
        posgrid.draw_maps(DEMO, TABLE, path=png)
    with pytest.raises(ValueError, match="for checkpoint files"):
        posgrid.draw_maps(TABLE, path=png, slots=1, tensor="pos_embed")
    with pytest.raises(ValueError, match="for arrays"):
        posgrid.draw_maps(DEMO, path=png, after_grid=16)
    with pytest.raises(TypeError, match="missing"):
        posgrid.draw_maps(TABLE)
