#!/usr/bin/env bash
# Performance benchmark of `posgrid resize` against cp, like for like, in one run.
#
#   bash bench/resize.sh [RUNS] [safetensors|pth]   (default 5 runs, safetensors)
#
# Generates (with the project's own code) a ~1.2 GB F32 checkpoint shaped like a 24-block,
# width-1024 vision transformer (as safetensors, and as a PyTorch file written by posgrid's own
# PyTorch writer), then times, alternating, on the chosen container:
#   durable pair:  posgrid resize --grid 24          vs  cp + sync of the copy
#   scratch pair:  posgrid resize --grid 24 --no-sync  vs  plain cp
# The destination is removed before every run. Prints the median wall time of each command,
# the ratio of each pair and posgrid's peak resident memory (from /usr/bin/time -v).
set -euo pipefail
cd "$(dirname "$0")/.."
runs=${1:-5}
ext=${2:-safetensors}
work=${BENCH_DIR:-target/bench}
mkdir -p "$work"
cargo build --release --quiet --bin posgrid --example make_large
bin=target/release/posgrid
base="$work/vit-large-224.safetensors"
[ -f "$base" ] && [ -f "$work/vit-large-224.pth" ] || target/release/examples/make_large "$base" "$work/vit-large-224.pth"
src="$work/vit-large-224.$ext"
dst="$work/out.$ext"
sync

measure() { # label, then the command; appends "label seconds peak_kib" to $work/times
  local label=$1; shift
  rm -f "$dst"; sync
  /usr/bin/time -f "%e %M" -o "$work/one" "$@" >/dev/null
  echo "$label $(cat "$work/one")" >> "$work/times"
}

: > "$work/times"
# One warm-up round, not counted (first runs pay for cold caches).
for cmd in "$bin resize $src -o $dst --grid 24 --quiet" "cp $src $dst"; do rm -f "$dst"; $cmd; done
: > "$work/times"
for i in $(seq "$runs"); do
  measure posgrid-sync "$bin" resize "$src" -o "$dst" --grid 24 --quiet
  measure cp-sync bash -c "cp '$src' '$dst' && sync '$dst'"
  measure posgrid-nosync "$bin" resize "$src" -o "$dst" --grid 24 --quiet --no-sync
  measure cp cp "$src" "$dst"
done
rm -f "$dst"

python3 - "$work/times" "$(stat -c %s "$src")" <<'PY'
import statistics, sys
rows = [l.split() for l in open(sys.argv[1])]
t = {}
peak = 0
for label, secs, kib in rows:
    t.setdefault(label, []).append(float(secs))
    if label.startswith("posgrid"):
        peak = max(peak, int(kib))
med = {k: statistics.median(v) for k, v in t.items()}
size = int(sys.argv[2]) / 1e9
print(f"input {size:.2f} GB, {len(t['cp'])} runs each, medians:")
for k in ["posgrid-sync", "cp-sync", "posgrid-nosync", "cp"]:
    print(f"  {k:15} {med[k]:6.2f} s   (runs: {', '.join(f'{x:.2f}' for x in t[k])})")
r1 = med["posgrid-sync"] / med["cp-sync"]
r2 = med["posgrid-nosync"] / med["cp"]
print(f"durable ratio (posgrid / cp+sync):      {r1:.3f}  (target <= 1.25)")
print(f"scratch ratio (posgrid --no-sync / cp): {r2:.3f}  (target <= 1.25)")
print(f"posgrid peak resident memory: {peak / 1024:.1f} MiB  (target <= 64 MiB)")
PY
