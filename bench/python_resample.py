"""The cost of resampling through the Python package against the Rust engine benchmark, on the
same sizes (benches/resample.rs: bicubic 37x37 -> 74x74 at D 1024, 64x64 -> 128x128 at D 1280,
float32), measured in alternating rounds so that the load of a shared machine falls on both.

    cargo bench --bench resample --no-run          # builds the engine benchmark
    python bench/python_resample.py [ROUNDS]       # with the package installed

Each round runs the engine benchmark (25 timed calls per size, its median) and then the same
calls through posgrid.resample (25 per size and layout, median): `[H*W, D]` is the engine's own
work; `[1, 1+H*W, D]` adds a class slot, copied ahead of the resampled rows. Prints the median
over rounds of each and the ratio Python / Rust (target: at most 1.2).
"""

import pathlib
import re
import statistics
import subprocess
import sys
import time

import numpy as np

import posgrid

REPO = pathlib.Path(__file__).resolve().parents[1]
SIZES = [((37, 37), (74, 74), 1024), ((64, 64), (128, 128), 1280)]
CALLS = 25


def engine_benchmark() -> pathlib.Path:
    """The engine benchmark binary cargo built (the newest one)."""
    found = sorted(
        (p for p in (REPO / "target" / "release" / "deps").glob("resample-*") if p.suffix == ""),
        key=lambda p: p.stat().st_mtime,
    )
    if not found:
        sys.exit("build the engine benchmark first: cargo bench --bench resample --no-run")
    return found[-1]


def rust_round(binary: pathlib.Path) -> dict:
    """Median milliseconds per size from one run of the engine benchmark."""
    out = subprocess.run([str(binary), "--bench"], capture_output=True, text=True, check=True).stdout
    times = {}
    for line in out.splitlines():
        m = re.match(r"bicubic (\d+)x(\d+) -> (\d+)x(\d+), D = (\d+), f32: resample ([\d.]+) ms", line)
        if m:
            times[(int(m[1]), int(m[3]), int(m[5]))] = float(m[6])
    return times


def table(src, d, slots):
    """The engine benchmark's values: ((i * 7919) % 1000) / 1000, row-major."""
    n = src[0] * src[1] * d
    values = ((np.arange(n, dtype=np.int64) * 7919) % 1000).astype(np.float32) / 1000
    grid = values.reshape(src[0] * src[1], d)
    if slots == 0:
        return grid
    return np.concatenate([np.full((slots, d), 0.5, np.float32), grid])[None]


def python_round() -> dict:
    """Median milliseconds per size and layout of posgrid.resample."""
    times = {}
    for src, dst, d in SIZES:
        for slots in (0, 1):
            t = table(src, d, slots)
            samples = []
            for _ in range(CALLS):
                start = time.perf_counter()
                out = posgrid.resample(t, dst, slots=slots, source_grid=src)
                samples.append(time.perf_counter() - start)
                del out
            times[(src[0], dst[0], d, slots)] = statistics.median(samples) * 1e3
    return times


def main():
    rounds = int(sys.argv[1]) if len(sys.argv) > 1 else 3
    binary = engine_benchmark()
    rust, python = [], []
    for _ in range(rounds):
        rust.append(rust_round(binary))
        python.append(python_round())
    print(f"{rounds} rounds, median over rounds of each round's median of {CALLS} calls")
    for src, dst, d in SIZES:
        engine = statistics.median(r[(src[0], dst[0], d)] for r in rust)
        for slots in (0, 1):
            binding = statistics.median(p[(src[0], dst[0], d, slots)] for p in python)
            layout = "[H*W, D]" if slots == 0 else "[1, 1+H*W, D]"
            print(
                f"bicubic {src[0]}x{src[1]} -> {dst[0]}x{dst[1]}, D = {d}, {layout:>14}: "
                f"Rust {engine:7.2f} ms, Python {binding:7.2f} ms, ratio {binding / engine:.2f}"
            )
    print(f"a call on a 2x2 table of width 1 (the binding's own cost): {call_overhead():.1f} us")


def call_overhead() -> float:
    """Median microseconds of a call whose work is nearly nothing (a 2x2 table of width 1 to
    3x3): the cost of the binding itself (arguments, layout checks, the output array)."""
    t = np.ones((4, 1), np.float32)
    samples = []
    for _ in range(2000):
        start = time.perf_counter()
        posgrid.resample(t, 3)
        samples.append(time.perf_counter() - start)
    return statistics.median(samples) * 1e6


if __name__ == "__main__":
    main()
