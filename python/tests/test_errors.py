"""Failures as exceptions: for the same failing request, the package raises the class of the
command line's exit code, with its exit code and the message it prints after `posgrid: error:`
(exit codes as the command line documents them in `posgrid --help`)."""

import math
import pickle

import numpy as np
import pytest
from safetensors.numpy import save_file

import posgrid
from conftest import DEMO, KINDS, cli, smooth_table

CLASSES = {
    2: posgrid.UsageError,
    3: posgrid.InvalidInputError,
    4: posgrid.TableError,
    5: posgrid.WriteError,
    6: posgrid.RefusedError,
}


def same_failure(call, cli_args, code):
    """The package's exception for `call` against the command line's exit and message."""
    run = cli(*cli_args)
    assert run.code == code, run.stderr
    with pytest.raises(posgrid.Error) as caught:
        call()
    e = caught.value
    assert type(e) is CLASSES[code]
    assert e.exit_code == code
    assert str(e) == run.message
    return e


def test_a_missing_file_is_invalid_input(tmp_path):
    missing = tmp_path / "missing.safetensors"
    e = same_failure(lambda: posgrid.scan(missing), ["scan", missing], 3)
    assert e.path == str(missing)


def test_a_file_that_is_no_checkpoint_is_invalid_input(tmp_path):
    junk = tmp_path / "junk.safetensors"
    junk.write_bytes(b"\x10\x00\x00\x00\x00\x00\x00\x00{not json at all")
    same_failure(lambda: posgrid.scan(junk), ["scan", junk], 3)
    out = tmp_path / "out.safetensors"
    same_failure(lambda: posgrid.resize(junk, out, grid=4), ["resize", junk, "-o", out, "--grid", "4"], 3)


def test_no_table_and_a_missing_named_tensor_are_table_errors(tmp_path):
    plain = tmp_path / "plain.safetensors"
    save_file({"head.weight": np.ones((3, 4), np.float32)}, str(plain))
    out = tmp_path / "out.safetensors"
    same_failure(lambda: posgrid.resize(plain, out, grid=4), ["resize", plain, "-o", out, "--grid", "4"], 4)
    same_failure(
        lambda: posgrid.scan(DEMO, tensors="nowhere"), ["scan", DEMO, "--tensor", "nowhere"], 4
    )
    png = tmp_path / "maps.png"
    same_failure(lambda: posgrid.draw_maps(plain, path=png), ["map", plain, "-o", png], 4)


def test_an_output_that_exists_or_has_no_directory_is_a_write_error(tmp_path):
    exists = tmp_path / "exists.safetensors"
    exists.write_bytes(b"keep me")
    same_failure(
        lambda: posgrid.resize(DEMO, exists, grid=16), ["resize", DEMO, "-o", exists, "--grid", "16"], 5
    )
    assert exists.read_bytes() == b"keep me"
    nowhere = tmp_path / "no-such-dir" / "out.safetensors"
    same_failure(
        lambda: posgrid.resize(DEMO, nowhere, grid=16), ["resize", DEMO, "-o", nowhere, "--grid", "16"], 5
    )


def test_a_table_with_nan_is_refused(tmp_path):
    table = smooth_table(6, 6, 8)
    table[0, 5, 3] = np.nan
    path = tmp_path / "nan.safetensors"
    save_file({"pos_embed": table, "cls_token": np.zeros((1, 1, 8), np.float32)}, str(path))
    out = tmp_path / "out.safetensors"
    same_failure(lambda: posgrid.resize(path, out, grid=8), ["resize", path, "-o", out, "--grid", "8"], 6)
    assert not out.exists()
    # Allowed on request, as with --allow-nonfinite.
    assert posgrid.resize(path, out, grid=8, allow_nonfinite=True)["tables"]


def test_a_memory_guard_refusal(tmp_path):
    out = tmp_path / "out.safetensors"
    same_failure(
        lambda: posgrid.resize(DEMO, out, grid=2000, memory_limit="1M"),
        ["resize", DEMO, "-o", out, "--grid", "2000", "--memory-limit", "1M"],
        6,
    )


def test_usage_errors_are_value_errors_with_the_command_line_message(tmp_path):
    out = tmp_path / "out.safetensors"
    e = same_failure(
        lambda: posgrid.resize(DEMO, out, grid=16, cubic_a=math.nan),
        ["resize", DEMO, "-o", out, "--grid", "16", "--cubic-a", "NaN"],
        2,
    )
    assert isinstance(e, ValueError)
    video = KINDS / "video.safetensors"
    same_failure(
        lambda: posgrid.resize(video, out, source_grid="8x14x14", grid=16, frames=15),
        ["resize", video, "-o", out, "--source-grid", "8x14x14", "--grid", "16", "--frames", "15"],
        2,
    )
    same_failure(
        lambda: posgrid.resize(video, out, grid="8x16x16", frames=16),
        ["resize", video, "-o", out, "--grid", "8x16x16", "--frames", "16"],
        2,
    )


def test_a_target_is_required_and_only_one():
    with pytest.raises(posgrid.UsageError, match="exactly one of --grid and --image"):
        posgrid.resize(DEMO, "out.safetensors")
    with pytest.raises(posgrid.UsageError, match="exactly one of --grid and --image"):
        posgrid.resize(DEMO, "out.safetensors", grid=16, image=128)


def test_every_class_is_a_posgrid_error_with_its_code():
    for code, cls in CLASSES.items():
        assert issubclass(cls, posgrid.Error)
        assert cls.exit_code == code
    assert issubclass(posgrid.UsageError, ValueError)


def test_exceptions_survive_pickling():
    e = posgrid.TableError("x.safetensors: no position table", "x.safetensors", 4)
    back = pickle.loads(pickle.dumps(e))
    assert type(back) is posgrid.TableError
    assert (str(back), back.path, back.exit_code) == (str(e), e.path, 4)
