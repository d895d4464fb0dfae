"""Small seeds for the header_and_discovery fuzz target, one per kind of grid-dependent tensor,
so the fuzzer starts from files that reach every kind's recognition (names, shapes, values).

Written with numpy and the reference safetensors library; the constructions (window-relative
index, shifted-window mask, 2-D rotary frequencies) are written here from their description.
Each file stays under a few kilobytes. Run from the repository root:

    python fuzz/make_kind_seeds.py
"""

import pathlib

import numpy as np
from safetensors.numpy import save_file

OUT = pathlib.Path(__file__).resolve().parent / "seeds"
rng = np.random.default_rng(20261213)


def relative_index(wh, ww):
    """[N, N]: row (dh + Wh - 1)(2Ww - 1) + (dw + Ww - 1) for the offset between positions."""
    rows, cols = np.repeat(np.arange(wh), ww), np.tile(np.arange(ww), wh)
    dh, dw = rows[:, None] - rows[None, :], cols[:, None] - cols[None, :]
    return ((dh + wh - 1) * (2 * ww - 1) + (dw + ww - 1)).astype(np.int64)


def with_class(index, table_rows):
    """The index one row and column larger: class->token M-3, token->class M-2, class->class M-1."""
    n = index.shape[0]
    out = np.zeros((n + 1, n + 1), np.int64)
    out[1:, 1:] = index
    out[0, :], out[:, 0], out[0, 0] = table_rows - 3, table_rows - 2, table_rows - 1
    return out


def shifted_mask(side, window, shift):
    """[nW, w*w, w*w]: 0 within a region of the rolled map, -100 across regions."""
    bands = np.zeros(side, np.int64)
    bands[side - window : side - shift] = 1
    bands[side - shift :] = 2
    regions = bands[:, None] * 3 + bands[None, :]
    per_window = regions.reshape(side // window, window, side // window, window)
    per_window = per_window.transpose(0, 2, 1, 3).reshape(-1, window * window)
    same = per_window[:, :, None] == per_window[:, None, :]
    return np.where(same, 0.0, -100.0).astype(np.float32)


def rotary(grid, side, width, theta):
    """cos and sin [G*G, 2d]: positions arange(G)/G*L, frequencies theta^(-2k/d) pairwise."""
    freqs = np.repeat(theta ** (-np.arange(0, width, 2) / width), 2)
    t = np.arange(grid) / grid * side
    angles = np.concatenate(
        [np.repeat(t, grid)[:, None] * freqs, np.tile(t, grid)[:, None] * freqs], axis=1
    )
    return np.cos(angles).astype(np.float32), np.sin(angles).astype(np.float32)


def values(*shape):
    return rng.standard_normal(shape).astype(np.float32)


def main():
    window = "layers.0.blocks.1.attn."
    save_file(
        {
            window + "relative_position_bias_table": values(25, 2),
            window + "relative_position_index": relative_index(3, 3),
            "layers.0.blocks.1.attn_mask": shifted_mask(6, 3, 1),
        },
        OUT / "kind-window.safetensors",
    )
    save_file(
        {
            "rel_pos_bias.relative_position_bias_table": values(28, 2),
            "rel_pos_bias.relative_position_index": with_class(relative_index(3, 3), 28),
            "patch_embed.proj.weight": values(4, 3, 2, 2),
        },
        OUT / "kind-window-class-rows.safetensors",
    )
    save_file(
        {
            "blocks.0.attn.rel_pos_h": values(5, 2),
            "blocks.0.attn.rel_pos_w": values(5, 2),
            "blocks.1.attn.rel_pos_h": values(7, 2),
            "blocks.1.attn.rel_pos_w": values(7, 2),
        },
        OUT / "kind-axial.safetensors",
    )
    cos, sin = rotary(4, 4, 4, 10000.0)
    save_file({"rope.freqs_cos": cos, "rope.freqs_sin": sin}, OUT / "kind-rotary.safetensors")
    save_file(
        {
            "pos_embed": values(1, 1 + 2 * 3 * 3, 4),
            "time_embed": values(1, 2, 4),
            "patch_embed.proj.weight": values(4, 3, 2, 2, 2),
        },
        OUT / "kind-video.safetensors",
    )


if __name__ == "__main__":
    main()
