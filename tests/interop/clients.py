"""Interop checks with the reference safetensors library and numpy.

    python clients.py write DIR      write F32, F16 and BF16 checkpoints with metadata
    python clients.py check IN OUT GRID   check posgrid's OUT against IN: every untouched
                                          tensor equal, the table resized to GRID x GRID
    python clients.py write-npz DIR       JAX-style npz files with numpy (savez, savez_compressed,
                                          and one with a Fortran-order table)
    python clients.py check-npz IN OUT GRID
    python clients.py write-sharded DIR   a two-shard set (shards by the reference library)
    python clients.py check-sharded IN OUT GRID
    python clients.py write-model-dir DIR a model directory: weights by the reference library,
                                          config.json and preprocessor_config.json by json
    python clients.py check-model-dir IN OUT GRID   json reads OUT's configurations at the new
                                          size, the reference library reads the weights
    python clients.py write-moving DIR    two one-block tables between large tensors, which
                                          posgrid moves to the end of the data area
    python clients.py check-moving IN OUT GRID
"""

import json
import os
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
        # Large enough to hold whole 4 KiB blocks: posgrid then pads its header so that this
        # tensor keeps its offset modulo the block, which the reference loader must accept.
        "encoder.blocks.1.mlp.fc2.weight": rng.standard_normal((64, 1000)).astype(dtype),
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


JAX_TABLE = "Transformer/posembed_input/pos_embedding"


def jax_arrays():
    rng = np.random.default_rng(5)
    return {
        JAX_TABLE: smooth_table().astype(np.float32),
        "embedding/kernel": rng.standard_normal((4, 4, 3, D)).astype(np.float32),
        "embedding/bias": np.zeros(D, np.float32),
        "Transformer/encoderblock_0/MlpBlock_3/Dense_0/kernel": rng.standard_normal((D, 4 * D)).astype(np.float32),
        "cls": rng.standard_normal((1, 1, D)).astype(np.float32),
        "head/kernel": rng.standard_normal((D, 10)).astype(">f4"),
        # Whole 4 KiB blocks: posgrid pads the member's local header to keep its offset.
        "Transformer/encoderblock_1/MlpBlock_3/Dense_1/kernel": rng.standard_normal((1000, 64)).astype(np.float32),
    }


def write_npz(folder):
    np.savez(f"{folder}/plain.npz", **jax_arrays())
    np.savez_compressed(f"{folder}/compressed.npz", **jax_arrays())
    arrays = jax_arrays()
    arrays[JAX_TABLE] = np.asfortranarray(arrays[JAX_TABLE][0])  # [N, D], Fortran order
    np.savez(f"{folder}/fortran.npz", **arrays)


def check_npz(inp, out, grid):
    grid = int(grid)
    a = np.load(inp)
    b = np.load(out) if out.endswith(".npz") else load_file(out)
    keys_b = list(b.files) if hasattr(b, "files") else list(b.keys())
    assert sorted(a.files) == sorted(keys_b), (a.files, keys_b)
    for k in a.files:
        if k == JAX_TABLE:
            assert b[k].shape == (1, 1 + grid * grid, D), b[k].shape
            assert b[k].dtype == np.float32
            assert np.array_equal(b[k][0, 0], a[k][0, 0]), "class slot kept"
        else:
            assert np.array_equal(a[k], b[k]), k
            if hasattr(b, "files"):
                assert a[k].dtype == b[k].dtype, (k, a[k].dtype, b[k].dtype)
    print(f"ok {out}")


def write_sharded(folder):
    rng = np.random.default_rng(9)
    shard1 = {
        "vision_model.embeddings.position_embedding.weight": smooth_table()[0].astype(np.float32),
        "vision_model.embeddings.patch_embedding.weight": rng.standard_normal((D, 3, 4, 4)).astype(np.float32),
    }
    shard2 = {
        "vision_model.embeddings.position_ids": np.arange(1 + GRID * GRID, dtype=np.int64)[None],
        "vision_model.encoder.layers.0.mlp.fc1.weight": rng.standard_normal((4 * D, D)).astype(np.float32),
    }
    shard3 = {"vision_model.post_layernorm.weight": np.ones(D, np.float32)}
    weight_map = {}
    for i, shard in enumerate([shard1, shard2, shard3], 1):
        name = f"model-{i:05d}-of-00003.safetensors"
        save_file(shard, f"{folder}/{name}", metadata={"format": "pt"})
        weight_map.update({k: name for k in shard})
    total = sum(v.nbytes for s in (shard1, shard2, shard3) for v in s.values())
    with open(f"{folder}/model.safetensors.index.json", "w") as f:
        json.dump({"metadata": {"total_size": total}, "weight_map": weight_map}, f, indent=2)
    with open(f"{folder}/config.json", "w") as f:
        json.dump({"image_size": GRID * 4}, f)


def check_sharded(inp, out, grid):
    grid = int(grid)
    index_in = json.load(open(f"{inp}/model.safetensors.index.json"))
    index = json.load(open(f"{out}/model.safetensors.index.json"))
    assert index["weight_map"] == index_in["weight_map"]
    total = 0
    for name in sorted(set(index["weight_map"].values())):
        a, b = load_file(f"{inp}/{name}"), load_file(f"{out}/{name}")
        for k, v in b.items():
            total += v.nbytes
            if k.endswith("position_embedding.weight"):
                assert v.shape == (1 + grid * grid, D), v.shape
            elif k.endswith("position_ids"):
                assert np.array_equal(v, np.arange(1 + grid * grid)[None]), v
            else:
                assert np.array_equal(a[k], v) and a[k].dtype == v.dtype, k
    assert index["metadata"]["total_size"] == total, (index["metadata"], total)
    # The recorded input size follows the new grid; nothing else in the file changes.
    config_in, config = json.load(open(f"{inp}/config.json")), json.load(open(f"{out}/config.json"))
    assert config == dict(config_in, image_size=grid * 4), config
    print(f"ok {out}")


# A model directory as a widely used model library writes one (file and key names: common
# practice, from memory): json.dump with indent=2 and sorted keys.
MODEL_CONFIG = {
    "architectures": ["ViTModel"],
    "hidden_size": D,
    "image_size": GRID * 4,
    "layer_norm_eps": 1e-12,
    "max_position_embeddings": GRID * 4,
    "model_type": "vit",
    "patch_size": 4,
}
PREPROCESSOR = {
    "crop_size": {"height": GRID * 4, "width": GRID * 4},
    "do_center_crop": True,
    "do_resize": True,
    "image_mean": [0.5, 0.5, 0.5],
    "image_processor_type": "ViTImageProcessor",
    "size": {"shortest_edge": GRID * 4},
}
SIDE_FILES = {".gitattributes": "*.safetensors filter=lfs diff=lfs merge=lfs -text\n", "README.md": "# model\n"}


MOVING_TABLES = ("decoder_pos_embed", "pos_embed")


def write_moving(folder):
    rng = np.random.default_rng(13)
    width = 64
    tables = {name: (smooth_table()[:, 1 : 1 + 16, :1] * np.ones(width)).astype(np.float32) for name in MOVING_TABLES}
    save_file(
        {
            "blocks.0.mlp.weight": rng.standard_normal((width, 300)).astype(np.float32),
            "head.weight": rng.standard_normal((width, 200)).astype(np.float32),
            "proj.weight": rng.standard_normal((width, 100)).astype(np.float32),
            **tables,
        },
        f"{folder}/moving.safetensors",
    )


def check_moving(inp, out, grid):
    grid = int(grid)
    a, b = load_file(inp), load_file(out)
    assert sorted(a) == sorted(b), (sorted(a), sorted(b))
    for k, v in b.items():
        if k in MOVING_TABLES:
            assert v.shape == (1, grid * grid, 64), (k, v.shape)
        else:
            assert np.array_equal(a[k], v) and a[k].dtype == v.dtype, k
    # The header as the format defines it: an 8-byte little-endian length, then JSON.
    with open(out, "rb") as f:
        header = json.loads(f.read(int.from_bytes(f.read(8), "little")))
    spans = {k: t["data_offsets"] for k, t in header.items() if k != "__metadata__"}
    last = sorted(spans, key=lambda k: spans[k])[-2:]
    assert sorted(last) == sorted(MOVING_TABLES), spans
    print(f"ok {out}")



def write_model_dir(folder):
    save_file(tensors(np.float32), f"{folder}/model.safetensors", metadata={"format": "pt"})
    for name, value in [("config.json", MODEL_CONFIG), ("preprocessor_config.json", PREPROCESSOR)]:
        with open(f"{folder}/{name}", "w") as f:
            f.write(json.dumps(value, indent=2, sort_keys=True) + "\n")
    for name, text in SIDE_FILES.items():
        with open(f"{folder}/{name}", "w") as f:
            f.write(text)


def check_model_dir(inp, out, grid):
    grid = int(grid)
    assert sorted(os.listdir(out)) == sorted(os.listdir(inp)), (os.listdir(inp), os.listdir(out))
    side = grid * 4
    config = json.load(open(f"{out}/config.json"))
    assert config == dict(MODEL_CONFIG, image_size=side), config
    pre = json.load(open(f"{out}/preprocessor_config.json"))
    want = dict(PREPROCESSOR, crop_size={"height": side, "width": side}, size={"shortest_edge": side})
    assert pre == want, pre
    for name in SIDE_FILES:
        assert open(f"{out}/{name}", "rb").read() == open(f"{inp}/{name}", "rb").read(), name
    a, b = load_file(f"{inp}/model.safetensors"), load_file(f"{out}/model.safetensors")
    assert sorted(a) == sorted(b)
    for k, v in b.items():
        assert v.dtype == a[k].dtype, k
        if k == "encoder.pos_embed":
            assert v.shape == (1, 1 + grid * grid, D), v.shape
            assert np.isfinite(v).all() and np.array_equal(v[0, 0], a[k][0, 0]), "class slot kept"
        else:
            assert np.array_equal(a[k], v), k
    print(f"ok {out}")


if __name__ == "__main__":
    {
        "write": write,
        "check": check,
        "write-npz": write_npz,
        "check-npz": check_npz,
        "write-sharded": write_sharded,
        "check-sharded": check_sharded,
        "write-model-dir": write_model_dir,
        "write-moving": write_moving,
        "check-moving": check_moving,
        "check-model-dir": check_model_dir,
    }[sys.argv[1]](*sys.argv[2:])
