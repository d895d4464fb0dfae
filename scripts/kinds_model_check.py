"""Check, model by model, that a checkpoint resized by posgrid behaves at the new size exactly as
the model resizing its grid-dependent tensors on the fly would.

Not part of CI (it needs torch). Run it in the venv of fixtures/kinds/requirements.txt:

    python scripts/kinds_model_check.py [POSGRID] [--keep DIR]     # POSGRID: target/release/posgrid
    python scripts/kinds_model_check.py --self-test                 # the on-the-fly side alone

Two tiny models are built here, each constructible at any image size and window:
- a shifted-window model: patch embedding, two stages of two blocks (the second block of a
  stage shifted by half a window), patch merging between them; per block a window-relative
  bias table [(2W-1)^2, heads] with its index buffer, and an attention-mask buffer in shifted
  blocks whose window does not cover the stage (persistent buffers, as released checkpoints
  hold them). Default: 56 px, window 7 -> 96 px, window 12 (patch 4).
- a decomposed-relative model: patch embedding, an absolute table [1, H, W, C], windowed blocks
  (0, 2) and global blocks (1, 3), each with per-axis tables rel_pos_h / rel_pos_w [2S-1, head
  width] added to attention as decomposed relative positions (S = window or grid). Default:
  grid 32, window 10 -> grid 48, window 15 (patch 8).

For each: a randomly initialised checkpoint is saved at the pre-training size; the reference at
the new size resizes on the fly (window tables: F.interpolate bicubic, align_corners=False, on
the per-head [2W-1, 2W-1] image; per-axis tables: 1-D linear, align_corners=False; pos_embed:
bicubic; index and mask buffers constructed anew) and loads with strict=True; posgrid resizes
the checkpoint (`posgrid resize IN -o OUT --image/--grid ... --window ... --json`), the model
at the new size loads OUT with strict=True, and both run on the same random input. Printed: the
largest difference per grid-dependent tensor and of the outputs (target <= 1e-4). Exit status 1
if posgrid failed or a difference is over the target.

Sizes: --swin-image FROM:TO --swin-window FROM:TO --axial-grid FROM:TO --axial-window FROM:TO.
The fixture geometry of the decomposed model (--axial-grid 64:96 --axial-window 14:21) works but
its global attention over 9216 tokens needs several GB; the default keeps the same structure
(windows padded at both sizes, global blocks over the whole grid) at a quarter of the tokens.

--self-test checks the constructions against loops written out, that the on-the-fly reference
loads with strict=True, that resizing to the same size changes nothing, the comparison path with
the on-the-fly state standing in for posgrid's output (difference 0), and that tables resized
with another kernel are caught (outputs move past the target).
"""

import argparse
import json
import pathlib
import subprocess
import sys
import tempfile

import torch
import torch.nn as nn
import torch.nn.functional as F
from safetensors.torch import load_file, save_file

TARGET = 1e-4
ACROSS_REGIONS = -100.0  # shifted-window mask value across regions (common practice)


# ---------------------------------------------------------------------------------------------
# Constructions, written from their description.


def relative_index(window):
    """[N, N] int64, N = W*W: row (dh + W - 1)(2W - 1) + (dw + W - 1) of the table for the
    offset between query and key positions (row-major inside the window)."""
    rows = torch.arange(window).repeat_interleave(window)
    cols = torch.arange(window).repeat(window)
    dh = rows[:, None] - rows[None, :]
    dw = cols[:, None] - cols[None, :]
    return (dh + window - 1) * (2 * window - 1) + (dw + window - 1)


def shifted_window_mask(side, window, shift):
    """[nW, W*W, W*W]: 0 within one region of the cyclically shifted map, -100 across."""
    band = torch.zeros(side, dtype=torch.int64)
    band[side - window : side - shift] = 1
    band[side - shift :] = 2
    label = band[:, None] * 3 + band[None, :]
    per_window = label.reshape(side // window, window, side // window, window).permute(0, 2, 1, 3)
    per_window = per_window.reshape(-1, window * window)
    same = per_window[:, :, None] == per_window[:, None, :]
    return torch.where(same, 0.0, ACROSS_REGIONS)


def axis_offsets(size):
    """[S, S]: row (i - j + S - 1) of a per-axis table for query i and key j."""
    steps = torch.arange(size)
    return steps[:, None] - steps[None, :] + size - 1


# ---------------------------------------------------------------------------------------------
# Shifted-window model.


def to_windows(x, window):
    """[B, H, W, C] -> [B * nW, W*W, C], windows row-major."""
    b, h, w, c = x.shape
    x = x.reshape(b, h // window, window, w // window, window, c).permute(0, 1, 3, 2, 4, 5)
    return x.reshape(-1, window * window, c)


def from_windows(x, window, h, w):
    c = x.shape[-1]
    x = x.reshape(-1, h // window, w // window, window, window, c).permute(0, 1, 3, 2, 4, 5)
    return x.reshape(-1, h, w, c)


class WindowAttention(nn.Module):
    def __init__(self, dim, heads, window):
        super().__init__()
        self.heads = heads
        self.qkv = nn.Linear(dim, 3 * dim)
        self.proj = nn.Linear(dim, dim)
        self.relative_position_bias_table = nn.Parameter(torch.randn((2 * window - 1) ** 2, heads))
        self.register_buffer("relative_position_index", relative_index(window))

    def forward(self, x, mask):
        groups, n, dim = x.shape
        q, k, v = self.qkv(x).reshape(groups, n, 3, self.heads, -1).permute(2, 0, 3, 1, 4)
        attn = (q * q.shape[-1] ** -0.5) @ k.transpose(-2, -1)
        bias = self.relative_position_bias_table[self.relative_position_index.reshape(-1)]
        attn = attn + bias.reshape(n, n, self.heads).permute(2, 0, 1)
        if mask is not None:
            windows = mask.shape[0]
            attn = attn.reshape(groups // windows, windows, self.heads, n, n) + mask[None, :, None]
            attn = attn.reshape(groups, self.heads, n, n)
        out = attn.softmax(-1) @ v
        return self.proj(out.transpose(1, 2).reshape(groups, n, dim))


def mlp(dim):
    return nn.Sequential(nn.Linear(dim, 2 * dim), nn.GELU(), nn.Linear(2 * dim, dim))


class ShiftedWindowBlock(nn.Module):
    def __init__(self, dim, heads, side, window, shifted):
        super().__init__()
        # A window covering the stage is the stage: no shift then (common practice).
        self.window = min(window, side)
        self.shift = self.window // 2 if shifted and side > self.window else 0
        if side % self.window:
            raise ValueError(f"a feature map of {side} is not a multiple of the window {self.window}")
        self.side = side
        self.norm1 = nn.LayerNorm(dim)
        self.attn = WindowAttention(dim, heads, self.window)
        self.norm2 = nn.LayerNorm(dim)
        self.mlp = mlp(dim)
        if self.shift:
            self.register_buffer("attn_mask", shifted_window_mask(side, self.window, self.shift))
        else:
            self.attn_mask = None

    def forward(self, x):
        b, n, c = x.shape
        y = self.norm1(x).reshape(b, self.side, self.side, c)
        y = torch.roll(y, (-self.shift, -self.shift), (1, 2))
        y = self.attn(to_windows(y, self.window), self.attn_mask)
        y = from_windows(y, self.window, self.side, self.side)
        y = torch.roll(y, (self.shift, self.shift), (1, 2)).reshape(b, n, c)
        x = x + y
        return x + self.mlp(self.norm2(x))


class PatchMerging(nn.Module):
    def __init__(self, dim, side):
        super().__init__()
        self.side = side
        self.norm = nn.LayerNorm(4 * dim)
        self.reduction = nn.Linear(4 * dim, 2 * dim, bias=False)

    def forward(self, x):
        b, _, c = x.shape
        x = x.reshape(b, self.side, self.side, c)
        quads = [x[:, 0::2, 0::2], x[:, 1::2, 0::2], x[:, 0::2, 1::2], x[:, 1::2, 1::2]]
        return self.reduction(self.norm(torch.cat(quads, -1).reshape(b, -1, 4 * c)))


class Stage(nn.Module):
    def __init__(self, dim, heads, side, window, merge):
        super().__init__()
        self.blocks = nn.ModuleList([ShiftedWindowBlock(dim, heads, side, window, shifted=i == 1) for i in range(2)])
        self.downsample = PatchMerging(dim, side) if merge else None

    def forward(self, x):
        for block in self.blocks:
            x = block(x)
        return x if self.downsample is None else self.downsample(x)


class PatchEmbed(nn.Module):
    def __init__(self, dim, patch, norm):
        super().__init__()
        self.proj = nn.Conv2d(3, dim, patch, patch)
        self.norm = nn.LayerNorm(dim) if norm else None

    def forward(self, x):
        x = self.proj(x).flatten(2).transpose(1, 2)
        return x if self.norm is None else self.norm(x)


class TinyShiftedWindow(nn.Module):
    PATCH, DIM, HEADS = 4, 24, (3, 6)

    def __init__(self, image, window):
        super().__init__()
        side = image // self.PATCH
        self.patch_embed = PatchEmbed(self.DIM, self.PATCH, norm=True)
        self.layers = nn.ModuleList()
        dim = self.DIM
        for stage, heads in enumerate(self.HEADS):
            last = stage == len(self.HEADS) - 1
            self.layers.append(Stage(dim, heads, side, window, merge=not last))
            if not last:
                dim, side = 2 * dim, side // 2
        self.norm = nn.LayerNorm(dim)
        self.head = nn.Linear(dim, 5)

    def forward(self, x):
        x = self.patch_embed(x)
        for stage in self.layers:
            x = stage(x)
        return self.head(self.norm(x).mean(1))


# ---------------------------------------------------------------------------------------------
# Decomposed-relative model.


def pad_to_windows(x, window):
    h, w = x.shape[1:3]
    pad_h, pad_w = -h % window, -w % window
    return F.pad(x, (0, 0, 0, pad_w, 0, pad_h)), h, w


class DecomposedAttention(nn.Module):
    def __init__(self, dim, heads, span):
        super().__init__()
        self.heads = heads
        self.qkv = nn.Linear(dim, 3 * dim)
        self.proj = nn.Linear(dim, dim)
        self.rel_pos_h = nn.Parameter(torch.randn(2 * span - 1, dim // heads))
        self.rel_pos_w = nn.Parameter(torch.randn(2 * span - 1, dim // heads))

    def forward(self, x):
        b, h, w, dim = x.shape
        qkv = self.qkv(x).reshape(b, h * w, 3, self.heads, -1).permute(2, 0, 3, 1, 4)
        q, k, v = qkv.reshape(3, b * self.heads, h * w, -1)
        attn = (q * q.shape[-1] ** -0.5) @ k.transpose(-2, -1)
        attn = attn + decomposed_bias(q.reshape(b * self.heads, h, w, -1), self.rel_pos_h, self.rel_pos_w)
        out = (attn.softmax(-1) @ v).reshape(b, self.heads, h, w, -1).permute(0, 2, 3, 1, 4)
        return self.proj(out.reshape(b, h, w, dim))


def decomposed_bias(q, table_h, table_w):
    """[G, H*W, H*W]: q(i) . R_h[i_h - j_h] + q(i) . R_w[i_w - j_w] for query i, key j."""
    g, h, w, _ = q.shape
    along_h = torch.einsum("bhwc,hkc->bhwk", q, table_h[axis_offsets(h)])
    along_w = torch.einsum("bhwc,wkc->bhwk", q, table_w[axis_offsets(w)])
    bias = along_h[:, :, :, :, None] + along_w[:, :, :, None, :]
    return bias.reshape(g, h * w, h * w)


class DecomposedBlock(nn.Module):
    def __init__(self, dim, heads, grid, window):
        super().__init__()
        self.window = window  # 0: global attention over the whole grid
        self.norm1 = nn.LayerNorm(dim)
        self.attn = DecomposedAttention(dim, heads, window or grid)
        self.norm2 = nn.LayerNorm(dim)
        self.mlp = mlp(dim)

    def forward(self, x):
        y = self.norm1(x)
        if self.window:
            padded, h, w = pad_to_windows(y, self.window)
            ph, pw = padded.shape[1:3]
            y = to_windows(padded, self.window).reshape(-1, self.window, self.window, y.shape[-1])
            y = self.attn(y).reshape(-1, self.window * self.window, y.shape[-1])
            y = from_windows(y, self.window, ph, pw)[:, :h, :w]
        else:
            y = self.attn(y)
        x = x + y
        return x + self.mlp(self.norm2(x))


class TinyDecomposed(nn.Module):
    PATCH, DIM, HEADS, GLOBAL_BLOCKS = 8, 16, 2, (1, 3)

    def __init__(self, grid, window):
        super().__init__()
        self.patch_embed = PatchEmbed(self.DIM, self.PATCH, norm=False)
        self.pos_embed = nn.Parameter(torch.randn(1, grid, grid, self.DIM))
        blocks = [0 if i in self.GLOBAL_BLOCKS else window for i in range(4)]
        self.blocks = nn.ModuleList([DecomposedBlock(self.DIM, self.HEADS, grid, w) for w in blocks])
        self.head = nn.Linear(self.DIM, 5)
        self.grid = grid

    def forward(self, x):
        x = self.patch_embed.proj(x).permute(0, 2, 3, 1) + self.pos_embed
        for block in self.blocks:
            x = block(x)
        return self.head(x.mean((1, 2)))


# ---------------------------------------------------------------------------------------------
# Resizing on the fly: the new model's own buffers, the old tensors resized to its shapes.


def window_table_bicubic(table, rows):
    heads, side_from, side_to = table.shape[1], round(table.shape[0] ** 0.5), round(rows**0.5)
    image = table.T.reshape(1, heads, side_from, side_from)
    out = F.interpolate(image, size=(side_to, side_to), mode="bicubic", align_corners=False)
    return out.reshape(heads, rows).T


def axis_table_linear(table, rows):
    return F.interpolate(table.T[None], size=rows, mode="linear", align_corners=False)[0].T


def pos_embed_bicubic(table, grid):
    out = F.interpolate(table.permute(0, 3, 1, 2), size=grid, mode="bicubic", align_corners=False)
    return out.permute(0, 2, 3, 1)


RESIZE_BY_SUFFIX = {
    "relative_position_bias_table": window_table_bicubic,
    "rel_pos_h": axis_table_linear,
    "rel_pos_w": axis_table_linear,
}
REBUILT_SUFFIXES = ("relative_position_index", "attn_mask")


def resized_on_the_fly(old_state, new_model):
    """The state dict the new model gets by resizing the old one's tensors at load time."""
    state = {}
    for name, own in new_model.state_dict().items():
        suffix = name.rsplit(".", 1)[-1]
        old = old_state[name] if name in old_state else None
        if suffix in REBUILT_SUFFIXES:
            state[name] = own.clone()
        elif suffix in RESIZE_BY_SUFFIX:
            state[name] = RESIZE_BY_SUFFIX[suffix](old, own.shape[0]).contiguous()
        elif name == "pos_embed":
            state[name] = pos_embed_bicubic(old, tuple(own.shape[1:3])).contiguous()
        else:
            state[name] = old.clone()
    return state


# ---------------------------------------------------------------------------------------------
# The two models, their sizes and the posgrid arguments for them.


def parse_pair(text):
    before, after = text.split(":")
    return int(before), int(after)


def shifted_window_case(image, window):
    (image_from, image_to), (window_from, window_to) = image, window
    return {
        "name": "shifted-window",
        "build_from": lambda: TinyShiftedWindow(image_from, window_from),
        "build_to": lambda: TinyShiftedWindow(image_to, window_to),
        "image_to": image_to,
        "args": ["--image", str(image_to), "--window", str(window_to)],
        "what": f"{image_from} px, window {window_from} -> {image_to} px, window {window_to}",
    }


def decomposed_case(grid, window):
    (grid_from, grid_to), (window_from, window_to) = grid, window
    return {
        "name": "decomposed-relative",
        "build_from": lambda: TinyDecomposed(grid_from, window_from),
        "build_to": lambda: TinyDecomposed(grid_to, window_to),
        "image_to": grid_to * TinyDecomposed.PATCH,
        "args": ["--grid", str(grid_to), "--window", str(window_to)],
        "what": f"grid {grid_from}, window {window_from} -> grid {grid_to}, window {window_to}",
    }


def saved_checkpoint(case, folder, seed):
    torch.manual_seed(seed)
    model = case["build_from"]().eval()
    path = pathlib.Path(folder) / f"{case['name']}.safetensors"
    state = {k: v.contiguous() for k, v in model.state_dict().items()}
    save_file(state, str(path))
    return path, state


def run_posgrid(posgrid, source, target, args):
    """posgrid resize; returns (its JSON report or None, a failure message or None)."""
    command = [posgrid, "resize", str(source), "-o", str(target), *args, "--json"]
    print("  $ " + " ".join(command))
    try:
        done = subprocess.run(command, capture_output=True, text=True, timeout=600)
    except OSError as err:
        return None, f"could not run posgrid: {err}"
    if done.returncode != 0:
        return None, f"posgrid exited with {done.returncode}: {done.stderr.strip()}"
    try:
        return json.loads(done.stdout), None
    except json.JSONDecodeError as err:
        return None, f"posgrid's --json output is not JSON ({err})"


def loaded_strictly(build, state):
    model = build().eval()
    own = model.state_dict()
    wrong = [f"{k}: {state[k].dtype} (model {own[k].dtype})" for k in own if k in state and state[k].dtype != own[k].dtype]
    if wrong:
        raise ValueError("dtype differs: " + "; ".join(wrong))
    model.load_state_dict(state, strict=True)
    return model


def grid_dependent_differences(offline, online, old_state):
    """Largest |difference| per tensor that changed shape or is a rebuilt buffer."""
    rows = []
    for name, reference in online.items():
        suffix = name.rsplit(".", 1)[-1]
        changed = name not in old_state or old_state[name].shape != reference.shape
        if changed or suffix in REBUILT_SUFFIXES:
            diff = (offline[name].double() - reference.double()).abs().max().item()
            rows.append((name, list(reference.shape), diff))
        elif not torch.equal(offline[name], reference):
            rows.append((name + " (should be unchanged)", list(reference.shape), float("inf")))
    return rows


def compare(case, offline_state, online_state, old_state, seed):
    offline = loaded_strictly(case["build_to"], offline_state)
    online = loaded_strictly(case["build_to"], online_state)
    torch.manual_seed(seed + 1)
    x = torch.randn(2, 3, case["image_to"], case["image_to"])
    with torch.no_grad():
        out_offline, out_online = offline(x), online(x)
    rows = grid_dependent_differences(offline_state, online_state, old_state)
    for name, shape, diff in rows:
        print(f"    {name} {shape}: max|diff| {diff:.2e}")
    output = (out_offline - out_online).abs().max().item()
    print(f"    outputs {list(out_online.shape)}: max|diff| {output:.2e} (target <= {TARGET:g})")
    return max([output] + [d for _, _, d in rows])


def check_with_posgrid(posgrid, cases, folder, seed):
    worst, failures = 0.0, []
    for case in cases:
        print(f"{case['name']}: {case['what']}")
        source, old_state = saved_checkpoint(case, folder, seed)
        online_state = resized_on_the_fly(old_state, case["build_to"]().eval())
        loaded_strictly(case["build_to"], online_state)
        print("  on-the-fly reference loads with strict=True")
        target = pathlib.Path(folder) / f"{case['name']}-resized.safetensors"
        report, failure = run_posgrid(posgrid, source, target, case["args"])
        if failure:
            print(f"  FAIL {failure}")
            failures.append(case["name"])
            continue
        (pathlib.Path(folder) / f"{case['name']}-resized.json").write_text(json.dumps(report, indent=1))
        try:
            diff = compare(case, load_file(str(target)), online_state, old_state, seed)
        except (ValueError, RuntimeError, KeyError) as err:
            print(f"  FAIL posgrid's output does not load into the model at the new size: {err}")
            failures.append(case["name"])
            continue
        worst = max(worst, diff)
        print(f"  {'ok' if diff <= TARGET else 'FAIL'} largest difference {diff:.2e}")
        if diff > TARGET:
            failures.append(case["name"])
    return worst, failures


# ---------------------------------------------------------------------------------------------
# Self-test: the on-the-fly side and the comparison, without posgrid.


def brute_force_index(window):
    n = window * window
    out = torch.empty(n, n, dtype=torch.int64)
    for a in range(n):
        for b in range(n):
            (h1, w1), (h2, w2) = divmod(a, window), divmod(b, window)
            out[a, b] = (h1 - h2 + window - 1) * (2 * window - 1) + (w1 - w2 + window - 1)
    return out


def brute_force_mask(side, window, shift):
    """Regions labelled by slicing the map into three bands per axis, windows cut one by one."""
    label = torch.zeros(side, side, dtype=torch.int64)
    bands = [slice(0, side - window), slice(side - window, side - shift), slice(side - shift, side)]
    for i, rows in enumerate(bands):
        for j, cols in enumerate(bands):
            label[rows, cols] = 3 * i + j
    masks = []
    for top in range(0, side, window):
        for left in range(0, side, window):
            cell = label[top : top + window, left : left + window].reshape(-1)
            masks.append(torch.where(cell[:, None] == cell[None, :], 0.0, ACROSS_REGIONS))
    return torch.stack(masks)


def brute_force_decomposed(q, table_h, table_w):
    g, h, w, _ = q.shape
    out = torch.empty(g, h * w, h * w, dtype=q.dtype)
    for i in range(h * w):
        for j in range(h * w):
            (qh, qw), (kh, kw) = divmod(i, w), divmod(j, w)
            along_h = (q[:, qh, qw] * table_h[qh - kh + h - 1]).sum(-1)
            along_w = (q[:, qh, qw] * table_w[qw - kw + w - 1]).sum(-1)
            out[:, i, j] = along_h + along_w
    return out


def self_test_constructions():
    for window in (1, 2, 7, 12):
        assert torch.equal(relative_index(window), brute_force_index(window)), f"index, window {window}"
    for side, window in ((14, 7), (24, 12), (8, 4), (12, 3)):
        shift = window // 2
        assert torch.equal(shifted_window_mask(side, window, shift), brute_force_mask(side, window, shift)), (
            f"mask {side}/{window}"
        )
    torch.manual_seed(3)
    q, th, tw = torch.randn(2, 3, 4, 5), torch.randn(5, 5), torch.randn(7, 5)
    assert torch.allclose(decomposed_bias(q, th, tw), brute_force_decomposed(q, th, tw), atol=1e-5)
    print("constructions: index, mask and decomposed bias agree with loops written out")


def self_test_case(case, folder, seed):
    print(f"{case['name']}: {case['what']}")
    _, old_state = saved_checkpoint(case, folder, seed)
    online_state = resized_on_the_fly(old_state, case["build_to"]().eval())
    loaded_strictly(case["build_to"], online_state)
    print("  on-the-fly reference loads with strict=True")

    # The identity: resizing to the pre-training size gives back the same model.
    same = resized_on_the_fly(old_state, case["build_from"]().eval())
    for name, tensor in old_state.items():
        assert torch.allclose(same[name], tensor, atol=1e-6), f"identity changed {name}"
    print("  resizing to the same size keeps every tensor")

    # The comparison path, with the on-the-fly state standing in for posgrid's output file.
    stand_in = pathlib.Path(folder) / f"{case['name']}-stand-in.safetensors"
    save_file(online_state, str(stand_in))
    diff = compare(case, load_file(str(stand_in)), online_state, old_state, seed)
    assert diff == 0.0, f"stand-in differs by {diff}"

    # The check can fail: tables resized with another kernel move the outputs past the target.
    wrong = dict(online_state)
    for name, tensor in old_state.items():
        suffix = name.rsplit(".", 1)[-1]
        if suffix in RESIZE_BY_SUFFIX:
            rows = online_state[name].shape[0]
            wrong[name] = F.interpolate(tensor.T[None], size=rows, mode="nearest")[0].T.contiguous()
    print("  with tables resized by nearest instead:")
    diff = compare(case, wrong, online_state, old_state, seed)
    assert diff > TARGET, f"a wrong resize went unnoticed ({diff:.2e})"
    print("  ok")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("posgrid", nargs="?", default="target/release/posgrid")
    parser.add_argument("--self-test", action="store_true", help="check the on-the-fly side alone")
    parser.add_argument("--keep", metavar="DIR", help="write the checkpoints and reports here")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--swin-image", type=parse_pair, default=(56, 96), metavar="FROM:TO")
    parser.add_argument("--swin-window", type=parse_pair, default=(7, 12), metavar="FROM:TO")
    parser.add_argument("--axial-grid", type=parse_pair, default=(32, 48), metavar="FROM:TO")
    parser.add_argument("--axial-window", type=parse_pair, default=(10, 15), metavar="FROM:TO")
    options = parser.parse_args()
    cases = [
        shifted_window_case(options.swin_image, options.swin_window),
        decomposed_case(options.axial_grid, options.axial_window),
    ]
    for case in cases:
        try:
            case["build_from"](), case["build_to"]()
        except ValueError as err:
            parser.error(f"{case['name']}: {err}")
    with tempfile.TemporaryDirectory() as scratch:
        folder = options.keep or scratch
        pathlib.Path(folder).mkdir(parents=True, exist_ok=True)
        if options.self_test:
            self_test_constructions()
            for case in cases:
                self_test_case(case, folder, options.seed)
            print("self-test passed")
            return 0
        worst, failures = check_with_posgrid(options.posgrid, cases, folder, options.seed)
    print(f"worst difference {worst:.2e}; " + (f"FAILED: {', '.join(failures)}" if failures else "all ok"))
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
