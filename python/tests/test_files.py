"""scan and resize against the command line's `--json` reports and outputs on the same files:
the demo checkpoint and every fixture of fixtures/kinds (inputs and flags from its manifest,
expected tensors from the framework's interpolate, as the manifest records)."""

import pathlib

import numpy as np
import pytest
from safetensors.numpy import load_file

import posgrid
from conftest import DEMO, KIND_MANIFEST, KINDS, cli

KIND_INPUTS = sorted({case["input"] for case in KIND_MANIFEST["cases"].values()})


@pytest.mark.parametrize("path", [DEMO] + [KINDS / name for name in KIND_INPUTS], ids=lambda p: p.name)
def test_scan_returns_what_scan_json_prints(path):
    # Exit 4 (the video table's rows fit several grids) still prints the report.
    run = cli("scan", path, "--json")
    assert run.code in (0, 4), run.stderr
    assert posgrid.scan(str(path)) == run.json


def test_scan_takes_pathlike_and_discovery_options():
    run = cli("scan", KINDS / "video.safetensors", "--json", "--source-grid", "8x14x14")
    assert posgrid.scan(KINDS / "video.safetensors", source_grid=(8, 14, 14)) == run.json
    assert posgrid.scan(KINDS / "video.safetensors", source_grid="8x14x14") == run.json


def test_scan_with_slots_patch_and_tensor(vit_file):
    args = ["--slots", "1", "--patch", "8", "--tensor", "pos_embed"]
    run = cli("scan", vit_file, "--json", *args)
    assert run.code == 0, run.stderr
    got = posgrid.scan(vit_file, slots=1, patch=8, tensors=["pos_embed"])
    assert got == {**run.json, "file": str(vit_file)}
    assert posgrid.scan(vit_file, slots=1, patch=8, tensors="pos_embed") == got


def test_an_inconclusive_scan_is_returned_where_the_command_exits_4(tmp_path):
    from safetensors.numpy import save_file

    path = tmp_path / "no-table.safetensors"
    save_file({"head.weight": np.zeros((4, 8), np.float32)}, str(path))
    run = cli("scan", path, "--json")
    assert run.code == 4
    got = posgrid.scan(path)
    assert got == run.json
    assert not got["tables"]


def resize_both(tmp_path, src, args, **kwargs):
    """Resize with the command line and with the package into two files; return both reports
    and both outputs."""
    out_cli = tmp_path / ("cli-" + src.name)
    out_py = tmp_path / ("py-" + src.name)
    run = cli("resize", src, "-o", out_cli, "--json", *args)
    assert run.code == 0, run.stderr
    report = posgrid.resize(src, out_py, **kwargs)
    return run, report, out_cli, out_py


KWARGS = {
    "window_stages": dict(image=96, window=12),
    "window_class_rows": dict(image=384),
    "window_class_rows_blocks": dict(image=384),
    "axial": dict(grid=96, window=21),
    "rotary": dict(grid=24),
    "video_temporal": dict(frames=16, grid=16, kernel="bilinear", antialias="off"),
    "video": dict(source_grid="8x14x14", grid=(8, 16, 16)),
    "video_trilinear": dict(source_grid=(8, 14, 14), grid="4x16x16", kernel="bilinear", antialias="off"),
}


@pytest.mark.parametrize("case", sorted(KIND_MANIFEST["cases"]))
def test_resize_matches_the_command_line_on_every_kind_fixture(tmp_path, case):
    spec = KIND_MANIFEST["cases"][case]
    src = KINDS / spec["input"]
    run, report, out_cli, out_py = resize_both(tmp_path, src, spec["args"], **KWARGS[case])
    assert report == {**run.json, "output": str(out_py)}
    # The same bytes: the tables, the untouched tensors and the provenance record.
    assert out_py.read_bytes() == out_cli.read_bytes()
    # And the tables the framework's interpolate wrote (tolerance: 5e-5 of the reference's
    # largest magnitude, as tests/kinds_resize.rs allows).
    expected = load_file(str(KINDS / spec["expected"]))
    got = load_file(str(out_py))
    for name in spec["expected_tensors"]:
        tol = 5e-5 * np.abs(expected[name]).max()
        np.testing.assert_allclose(got[name], expected[name], rtol=0, atol=tol, err_msg=name)


def test_resize_the_demo_by_image_size_with_every_option_spelled(tmp_path):
    args = ["--image", "224", "--kernel", "bilinear", "--coords", "align-corners", "--edges",
            "renormalize", "--antialias", "on", "--cubic-a", "-0.5", "--no-sync", "--refs", "8",
            "--memory-limit", "512M"]
    run, report, out_cli, out_py = resize_both(
        tmp_path, DEMO, args, image=224, kernel="bilinear", coords="align-corners",
        edges="renormalize", antialias="on", cubic_a=-0.5, sync=False, refs=8, memory_limit="512M",
    )
    assert report == {**run.json, "output": str(out_py)}
    assert out_py.read_bytes() == out_cli.read_bytes()


def test_resize_dry_run_writes_nothing(tmp_path):
    out = tmp_path / "never.safetensors"
    run = cli("resize", DEMO, "-o", out, "--grid", "20x24", "--dry-run", "--json")
    report = posgrid.resize(DEMO, out, grid=(20, 24), dry_run=True)
    assert report == run.json
    assert report["dry_run"] and not out.exists()


def test_resize_to_the_same_grid_has_nothing_to_do(tmp_path):
    out = tmp_path / "same.safetensors"
    report = posgrid.resize(DEMO, out, grid=14)
    assert report == cli("resize", DEMO, "-o", out, "--grid", "14", "--json").json
    assert report["nothing_to_do"] and not out.exists()


def test_resize_converts_containers_and_draws_the_map(tmp_path, vit_file):
    out_cli, out_py = tmp_path / "cli.npz", tmp_path / "py.npz"
    png_cli, png_py = tmp_path / "cli.png", tmp_path / "py.png"
    run = cli("resize", vit_file, "-o", out_cli, "--grid", "16", "--format", "npz", "--map", png_cli, "--json")
    assert run.code == 0, run.stderr
    report = posgrid.resize(vit_file, out_py, grid=16, format="npz", map=png_py)
    assert report == {**run.json, "output": str(out_py), "map": str(png_py)}
    assert out_py.read_bytes() == out_cli.read_bytes()
    assert png_py.read_bytes() == png_cli.read_bytes()


def test_resize_replaces_only_with_force(tmp_path):
    out = tmp_path / "out.safetensors"
    posgrid.resize(DEMO, out, grid=16)
    with pytest.raises(posgrid.WriteError):
        posgrid.resize(DEMO, out, grid=16)
    assert posgrid.resize(DEMO, out, grid=18, force=True)["tables"][0]["to"] == [18, 18]


def test_the_package_runs_from_any_directory(tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    assert posgrid.scan(pathlib.Path(DEMO))["tables"][0]["grid"] == [14, 14]


def test_resize_a_linear_patch_embedding_with_its_order(tmp_path):
    # The noise case of fixtures/golden/linear_patch_cases.safetensors: no order reads from the
    # values, so patch_order gives it; the matrix equals numpy's pinv result from the file.
    from safetensors.numpy import save_file

    from conftest import FIXTURES

    golden = load_file(str(FIXTURES / "golden" / "linear_patch_cases.safetensors"))
    src = tmp_path / "linear.safetensors"
    save_file(
        {
            "to_patch_embedding.1.weight": golden["noise_out_in_8_12.w"],
            "pos_embedding": np.linspace(-1, 1, 17 * 4, dtype=np.float32).reshape(1, 17, 4),
        },
        str(src),
    )
    with pytest.raises(posgrid.TableError) as refused:
        posgrid.resize(src, tmp_path / "never.safetensors", image=48, new_patch=12)
    assert "--patch-order" in str(refused.value)
    args = ["--image", "48", "--new-patch", "12", "--patch-order", "cyx"]
    run, report, out_cli, out_py = resize_both(
        tmp_path, src, args, image=48, new_patch=12, patch_order="cyx"
    )
    assert report == {**run.json, "output": str(out_py)}
    assert out_py.read_bytes() == out_cli.read_bytes()
    expected = golden["noise_out_in_8_12.w_new"]
    got = load_file(str(out_py))["to_patch_embedding.1.weight"]
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-6 * np.abs(expected).max())
