"""Shared helpers: the repository's fixtures, the command-line binary the package is checked
against, and small checkpoints written with the reference safetensors library."""

import json
import os
import pathlib
import subprocess

import numpy as np
import pytest
from safetensors.numpy import save_file

REPO = pathlib.Path(__file__).resolve().parents[2]
FIXTURES = REPO / "fixtures"
DEMO = FIXTURES / "demo" / "pollen-vit-tiny.safetensors"
KINDS = FIXTURES / "kinds"
KIND_MANIFEST = json.loads((KINDS / "manifest.json").read_text())


def binary() -> pathlib.Path:
    """The posgrid binary built by `cargo build --release` (or the one POSGRID_BIN names)."""
    path = pathlib.Path(os.environ.get("POSGRID_BIN", REPO / "target" / "release" / "posgrid"))
    if not path.exists():
        pytest.fail(f"{path} is missing: run `cargo build --release` first (or set POSGRID_BIN)")
    return path


class Run:
    """One run of the command line: exit code, stdout (JSON when it parses) and stderr."""

    def __init__(self, proc: subprocess.CompletedProcess):
        self.code = proc.returncode
        self.stdout = proc.stdout
        self.stderr = proc.stderr
        try:
            self.json = json.loads(proc.stdout) if proc.stdout.strip() else None
        except json.JSONDecodeError:
            self.json = None

    @property
    def message(self) -> str:
        """The error message after the `posgrid: error: ` prefix."""
        prefix = "posgrid: error: "
        lines = [line for line in self.stderr.splitlines() if line.startswith(prefix)]
        assert len(lines) == 1, self.stderr
        return lines[0][len(prefix):]


def cli(*args) -> Run:
    proc = subprocess.run(
        [str(binary()), *map(str, args)],
        capture_output=True,
        text=True,
        stdin=subprocess.DEVNULL,
        timeout=300,
    )
    return Run(proc)


def smooth_table(rows: int, cols: int, dim: int, slots: int = 1, seed: int = 7) -> np.ndarray:
    """A float32 table [1, slots + rows*cols, dim] whose grid rows vary smoothly, as trained
    tables do (an invented construction: a few low-frequency waves per channel)."""
    rng = np.random.default_rng(seed)
    y, x = np.meshgrid(np.linspace(0, 1, rows), np.linspace(0, 1, cols), indexing="ij")
    fy, fx, phase = rng.uniform(0.5, 3, (3, dim))
    grid = np.sin(np.pi * (fy * y[..., None] + fx * x[..., None]) + 6 * phase)
    head = rng.standard_normal((slots, dim))
    table = np.concatenate([head, grid.reshape(rows * cols, dim)])
    return table[None].astype(np.float32)


@pytest.fixture
def vit_file(tmp_path) -> pathlib.Path:
    """A small invented ViT checkpoint (F32): a 1-slot 10x10 position table of width 24, its
    class token and an 8-pixel patch projection, written by the reference safetensors library."""
    rng = np.random.default_rng(11)
    tensors = {
        "cls_token": rng.standard_normal((1, 1, 24)).astype(np.float32),
        "pos_embed": smooth_table(10, 10, 24),
        "patch_embed.proj.weight": rng.standard_normal((24, 3, 8, 8)).astype(np.float32),
        "head.weight": rng.standard_normal((5, 24)).astype(np.float32),
    }
    path = tmp_path / "vit.safetensors"
    save_file(tensors, str(path))
    return path
