"""Interop checks with the reference safetensors library and numpy.

    python clients.py write DIR      write F32, F16 and BF16 checkpoints with metadata
    python clients.py check IN OUT GRID   check posgrid's OUT against IN: every untouched
                                          tensor equal, the table resized to GRID x GRID
"""

import json
import sys

import numpy as np
import safetensors
from safetensors import TensorSpec
from safetensors.numpy import load_file, save_file

D = 8
GRID = 6


def smooth_table():
    rng = np.random.default_rng(7)
    r, c = np.meshgrid(np.arange(GRID), np.arange(GRID), indexing="ij")
    freq = rng.uniform(0.2, 0.6, size=(D, 2))
    phase = rng.uniform(0, 6.28, size=D)
    grid = np.cos(r[..., None] * freq[:, 0] + c[..., None] * freq[:, 1] + phase) * 0.02
    cls = rng.standard_normal((1, D)) * 0.02
    return np.concatenate([cls, grid.reshape(-1, D)])[None].astype(np.float64)


def tensors(dtype):
    rng = np.random.default_rng(11)
    return {
        "encoder.pos_embed": smooth_table().astype(dtype),
        "encoder.patch_embed.proj.weight": rng.standard_normal((D, 3, 4, 4)).astype(dtype),
        "encoder.cls_token": rng.standard_normal((1, 1, D)).astype(dtype),
        "encoder.blocks.0.mlp.fc1.weight": rng.standard_normal((4 * D, D)).astype(dtype),
        "step": np.array([1234], dtype=np.int64),
    }


def write(folder):
    meta = {"writer": "reference safetensors library", "epoch": "7"}
    save_file(tensors(np.float32), f"{folder}/f32.safetensors", metadata=meta)
    save_file(tensors(np.float16), f"{folder}/f16.safetensors", metadata=meta)
    # numpy has no bfloat16: pass the bf16 bit patterns (round to nearest even) as raw data.
    specs, keep = {}, []
    for name, array in tensors(np.float32).items():
        if array.dtype == np.float32:
            bits = array.view(np.uint32).astype(np.uint64)
            rounded = ((bits + 0x7FFF + ((bits >> 16) & 1)) >> 16).astype(np.uint16)
            data, dtype = np.ascontiguousarray(rounded), "bfloat16"
        else:
            data, dtype = np.ascontiguousarray(array), array.dtype.name
        keep.append(data)
        specs[name] = TensorSpec(dtype=dtype, shape=list(array.shape), data_ptr=data.ctypes.data, data_len=data.nbytes)
    blob = safetensors.serialize(specs, metadata=meta)
    with open(f"{folder}/bf16.safetensors", "wb") as f:
        f.write(bytes(blob))


def raw(path):
    with open(path, "rb") as f:
        return dict(safetensors.deserialize(f.read()))


def check(inp, out, grid):
    grid = int(grid)
    a, b = raw(inp), raw(out)
    assert list(a) == list(b) or set(a) == set(b), "same tensor names"
    for name, t in a.items():
        u = b[name]
        assert u["dtype"] == t["dtype"], (name, u["dtype"], t["dtype"])
        if name == "encoder.pos_embed":
            assert list(u["shape"]) == [1, 1 + grid * grid, D], u["shape"]
            width = len(t["data"]) // (1 + GRID * GRID) // D
            assert u["data"][: D * width] == t["data"][: D * width], "class slot kept bit-exact"
        else:
            assert list(u["shape"]) == list(t["shape"]) and u["data"] == t["data"], name
    with safetensors.safe_open(out, "np") as f:
        meta = f.metadata()
    assert meta["writer"] == "reference safetensors library" and meta["epoch"] == "7", meta
    prov = json.loads(meta["posgrid"])
    assert prov["tables"][0]["to"] == [grid, grid], prov
    if a["encoder.pos_embed"]["dtype"] != "BF16":
        # numpy loads the whole output through the reference loader.
        arrays = load_file(out)
        table = arrays["encoder.pos_embed"]
        assert table.shape == (1, 1 + grid * grid, D) and np.isfinite(table).all()
    print(f"ok {out}")


if __name__ == "__main__":
    {"write": write, "check": check}[sys.argv[1]](*sys.argv[2:])
