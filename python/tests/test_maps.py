"""similarity, fidelity and draw_maps: maps against cosine similarity computed here in numpy,
profiles, scores and figures against `posgrid map --json` and its PNG on the same tables."""

import struct

import numpy as np
import pytest
from safetensors.numpy import load_file

import posgrid
from conftest import cli, smooth_table


def cosine_maps(grid: np.ndarray, refs) -> np.ndarray:
    """Cosine similarity of each reference row to every row of an [H, W, D] grid, in float64."""
    h, w, d = grid.shape
    rows = grid.reshape(h * w, d).astype(np.float64)
    unit = rows / np.linalg.norm(rows, axis=1, keepdims=True)
    return np.stack([unit @ unit[r * w + c] for r, c in refs]).reshape(len(refs), h, w)


def test_maps_are_cosine_similarities():
    table = smooth_table(10, 10, 24)
    got = posgrid.similarity(table, slots=1, refs=4)
    # References spread evenly: cell floor((i + 0.5) * side / n) of each axis, as `map`
    # documents them.
    assert got["ref_rows"] == got["ref_cols"] == [1, 3, 6, 8]
    assert got["maps"].shape == (4, 4, 10, 10) and got["maps"].dtype == np.float32
    refs = [(r, c) for r in got["ref_rows"] for c in got["ref_cols"]]
    expected = cosine_maps(table[0, 1:].reshape(10, 10, 24), refs).reshape(4, 4, 10, 10)
    np.testing.assert_allclose(got["maps"], expected, rtol=0, atol=1e-5)
    assert got["note"] is None


def test_a_reference_is_similar_to_itself():
    got = posgrid.similarity(smooth_table(6, 6, 8)[0], slots=1, refs=3)
    for i, r in enumerate(got["ref_rows"]):
        for j, c in enumerate(got["ref_cols"]):
            assert got["maps"][i, j, r, c] == pytest.approx(1, abs=1e-6)


def map_json(tmp_path, *files):
    png = tmp_path / "cli.png"
    run = cli("map", *files, "-o", png, "--json")
    assert run.code == 0, run.stderr
    return run.json, png


def resized_with_cli(tmp_path, src, grid):
    out = tmp_path / "resized.safetensors"
    run = cli("resize", src, "-o", out, "--grid", grid, "--json")
    assert run.code == 0, run.stderr
    return out, run.json


def test_the_profile_is_the_one_map_prints(vit_file, tmp_path):
    report, _ = map_json(tmp_path, vit_file)
    table = load_file(str(vit_file))["pos_embed"]
    got = posgrid.similarity(table, slots=1)
    np.testing.assert_array_equal(got["profile_distance"], report["profile"]["distance"])
    mean = [np.nan if m is None else m for m in report["profile"]["mean"]]
    np.testing.assert_array_equal(got["profile_mean"], mean)
    assert [len(got["ref_rows"]), len(got["ref_cols"])] == report["refs"]


def test_fidelity_is_the_score_map_and_resize_report(vit_file, tmp_path):
    after_file, resize_report = resized_with_cli(tmp_path, vit_file, "16")
    report, _ = map_json(tmp_path, vit_file, after_file)
    before = load_file(str(vit_file))["pos_embed"]
    after = load_file(str(after_file))["pos_embed"]
    got = posgrid.fidelity(before, after, slots=1)
    expected = report["fidelity"]
    assert got["score"] == pytest.approx(expected["score"], abs=1e-12)
    assert got["min"] == pytest.approx(expected["min"], abs=1e-12)
    assert list(got["worst"]) == expected["worst"]
    assert list(got["refs"]) == expected["refs"]
    assert got["undefined"] == expected["undefined"]
    assert got["score"] == pytest.approx(resize_report["tables"][0]["fidelity"], abs=1e-12)
    assert 0.9 < got["score"] <= 1


def test_fidelity_of_a_table_with_itself_is_one():
    table = smooth_table(8, 8, 16)
    got = posgrid.fidelity(table, table, slots=1)
    assert got["score"] == pytest.approx(1, abs=1e-9)
    assert got["undefined"] == 0 and got["note"] is None


def test_fidelity_of_zero_rows_is_undefined():
    zeros = np.zeros((1, 1 + 25, 4), np.float32)
    got = posgrid.fidelity(zeros, zeros, slots=1)
    assert got["score"] is None and got["worst"] is None and got["note"]


def png_size(data: bytes):
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    return struct.unpack(">II", data[16:24])


def test_draw_maps_of_files_is_the_map_command(vit_file, tmp_path):
    after_file, _ = resized_with_cli(tmp_path, vit_file, "16")
    report, cli_png = map_json(tmp_path, vit_file, after_file)
    png = tmp_path / "py.png"
    got = posgrid.draw_maps(vit_file, after_file, path=png)
    assert got == {**report, "output": str(png)}
    assert png.read_bytes() == cli_png.read_bytes()
    assert png_size(png.read_bytes()) == (got["width"], got["height"])


def test_draw_maps_of_arrays_draws_the_same_figure(vit_file, tmp_path):
    after_file, _ = resized_with_cli(tmp_path, vit_file, "16")
    report, cli_png = map_json(tmp_path, vit_file, after_file)
    before = load_file(str(vit_file))["pos_embed"]
    after = load_file(str(after_file))["pos_embed"]
    png = tmp_path / "arrays.png"
    got = posgrid.draw_maps(before, after, path=png, slots=1, name="pos_embed")
    assert png.read_bytes() == cli_png.read_bytes()
    for key in ["tensor", "dtype", "grid", "after_grid", "refs", "fidelity", "profile",
                "after_profile", "width", "height", "warnings"]:
        assert got[key] == report[key], key
    assert got["file"] is None and got["output"] == str(png)


def test_draw_maps_of_one_table(tmp_path):
    png = tmp_path / "one.png"
    got = posgrid.draw_maps(smooth_table(9, 9, 8), path=png, slots=1)
    assert png_size(png.read_bytes()) == (got["width"], got["height"])
    assert got["fidelity"] is None and got["after_grid"] is None
    with pytest.raises(posgrid.WriteError, match="already exists"):
        posgrid.draw_maps(smooth_table(9, 9, 8), path=png, slots=1)
    posgrid.draw_maps(smooth_table(9, 9, 8), path=png, slots=1, force=True)


def test_tables_of_different_widths_are_not_compared():
    with pytest.raises(posgrid.UsageError, match="different widths"):
        posgrid.fidelity(smooth_table(5, 5, 8), smooth_table(5, 5, 6), slots=1)
