#!/usr/bin/env bash
# `posgrid resize` on a file system that shares extents (XFS with reflink on, loop-mounted),
# against cp on the same file system, in one run.
#
#   sudo bash bench/reflink.sh [RUNS] [safetensors|pth|npz]   (default 7 runs, safetensors)
#
# Needs root, mkfs.xfs (Debian: apt-get install xfsprogs) and a free loop device; without them
# it says which is missing and exits 0 having measured nothing. Makes a sparse 4 GiB image
# under $BENCH_DIR (default target/bench), formats it with `mkfs.xfs -m reflink=1`, mounts it
# through a loop device with direct I/O (so syncs reach the disk),
# writes the ~1.2 GB large-ViT checkpoint (examples/make_large.rs; as a PyTorch file or an npz
# archive written by posgrid's own writers, when asked) into it, then times,
# alternating, with the destination removed (and the file system synced) before every run:
#   posgrid resize --grid 24            durable (synced before the rename), the default
#   posgrid resize --grid 24 --no-sync  the same without the sync: the difference is its cost
#   posgrid resize --grid 24 --dry-run  the table work alone (read, resample, score; no write)
#   cp --reflink=never [+ sync]         a plain copy of every byte, without and with a sync of
#                                       the copy (coreutils 9 cp clones by default on such file
#                                       systems, so the plain copy is spelled out)
#   cp --reflink=always [+ sync]        a clone of the whole file, without and with a sync
# and, once each, the new disk the file system uses for the output (df before and after).
# Prints the median of each, the ratios against the targets and the disk use.
# COLD=1 drops the page cache before every run (echo 3 > /proc/sys/vm/drop_caches), as for a
# checkpoint just downloaded or not read since boot: every command then reads what it needs
# from the disk, the copies the whole file, posgrid its header and tables.
set -euo pipefail
cd "$(dirname "$0")/.."
runs=${1:-7}
ext=${2:-safetensors}
skip() { echo "bench/reflink.sh skipped: $*"; exit 0; }
[ "$(id -u)" = 0 ] || skip "not running as root (loop-mounting an image needs root)"
command -v mkfs.xfs >/dev/null || skip "mkfs.xfs is not installed (Debian: apt-get install xfsprogs)"
command -v losetup >/dev/null && losetup -f >/dev/null 2>&1 || skip "no free loop device"

work=${BENCH_DIR:-target/bench}
mkdir -p "$work"
work=$(cd "$work" && pwd)
img="$work/xfs-reflink.img"
mnt="$work/xfs-reflink"
mkdir -p "$mnt"
cargo build --release --quiet --bin posgrid --example make_large
bin=$(pwd)/target/release/posgrid
rm -f "$img"
truncate -s 4G "$img"
mkfs.xfs -q -f -m reflink=1 "$img" || skip "mkfs.xfs -m reflink=1 failed (xfsprogs too old?)"
# Direct I/O on the loop device, so that a sync reaches the disk under the image rather than
# the page cache of the file holding it (a plain loop device where that is refused).
dev=$(losetup -f --show --direct-io=on "$img" 2>/dev/null || losetup -f --show "$img") \
  || skip "no loop device could be attached"
mount "$dev" "$mnt" || { losetup -d "$dev"; skip "the image could not be mounted"; }
trap 'cd /; umount "$mnt"; losetup -d "$dev" 2>/dev/null; rm -f "$img"' EXIT
dio=$(losetup -n -O DIO "$dev" | tr -d ' ')

base="$mnt/vit-large-224.safetensors"
case $ext in
  safetensors) target/release/examples/make_large "$base" >/dev/null ;;
  pth) target/release/examples/make_large "$base" "$mnt/vit-large-224.pth" >/dev/null ;;
  npz) target/release/examples/make_large "$base" "$mnt/vit-large-224.npz" >/dev/null ;;
  *) echo "unknown container $ext (safetensors, pth or npz)"; exit 2 ;;
esac
src="$mnt/vit-large-224.$ext"
dst="$mnt/out.$ext"
[ "$ext" = safetensors ] || rm -f "$base"
sync

times="$work/reflink-times"
: > "$times"
measure() { # label, then the command; appends "label seconds"
  local label=$1; shift
  rm -f "$dst"; sync
  [ "${COLD:-0}" = 1 ] && echo 3 > /proc/sys/vm/drop_caches
  local t0=$EPOCHREALTIME
  "$@" >/dev/null
  local t1=$EPOCHREALTIME
  echo "$label $(awk -v a="$t0" -v b="$t1" 'BEGIN { print b - a }')" >> "$times"
}
posgrid() { "$bin" resize "$src" -o "$dst" --grid 24 --quiet "$@"; }

# One warm-up round, not counted.
posgrid; rm -f "$dst"; cp --reflink=never "$src" "$dst"; rm -f "$dst"
for i in $(seq "$runs"); do
  measure posgrid-durable posgrid
  measure posgrid-nosync posgrid --no-sync
  measure posgrid-dryrun posgrid --dry-run
  measure cp-never cp --reflink=never "$src" "$dst"
  measure cp-never-sync bash -c "cp --reflink=never '$src' '$dst' && sync '$dst'"
  measure cp-reflink cp --reflink=always "$src" "$dst"
  measure cp-reflink-sync bash -c "cp --reflink=always '$src' '$dst' && sync '$dst'"
done

used() { sync; df -B1 --output=used "$mnt" | tail -1; }
# Each to a name of its own, nothing removed in between: XFS frees removed files' blocks in
# the background, which would blur the counts.
disk() { # label, then the command; prints "label new_bytes"
  local label=$1; shift
  local before; before=$(used)
  "$@" >/dev/null
  echo "$label $(( $(used) - before ))"
}
rm -f "$dst"
disk_lines=$(
  disk posgrid-durable "$bin" resize "$src" -o "$mnt/disk-1.$ext" --grid 24 --quiet
  disk cp-never cp --reflink=never "$src" "$mnt/disk-2.$ext"
  disk cp-reflink cp --reflink=always "$src" "$mnt/disk-3.$ext"
)
rm -f "$mnt"/disk-*

# The syncs of one durable resize, timed by strace where it is installed.
sync_ms=none
if command -v strace >/dev/null; then
  rm -f "$dst"; sync
  strace -f -T -e trace=fsync,fdatasync -o "$work/reflink-strace" "$bin" resize "$src" -o "$dst" --grid 24 --quiet
  sync_ms=$(grep -o '<[0-9.]*>' "$work/reflink-strace" | tr -d '<>' | awk '{ s += $1 } END { printf "%.2f", s * 1000 }')
fi
shared=$("$bin" resize "$src" -o "$dst" --grid 24 --force --json | python3 -c 'import json,sys; r=json.load(sys.stdin); print(r["bytes_shared"], r["bytes_copied"])')
rm -f "$dst"

python3 - "$times" "$(stat -c %s "$src")" "$disk_lines" "$shared" "$dio" "$sync_ms" "$ext" "${COLD:-0}" <<'PY'
import statistics, sys
t = {}
for line in open(sys.argv[1]):
    label, secs = line.split()
    t.setdefault(label, []).append(float(secs))
med = {k: statistics.median(v) for k, v in t.items()}
size = int(sys.argv[2])
disk = dict((l.split()[0], int(l.split()[1])) for l in sys.argv[3].splitlines())
shared, copied = map(int, sys.argv[4].split())
io = "direct I/O" if sys.argv[5] == "1" else "buffered"
cache = "page cache dropped before every run" if sys.argv[8] == "1" else "warm page cache"
print(f"XFS (reflink=1) on a loop device ({io}), {sys.argv[7]} input {size / 1e9:.2f} GB, {cache}, {len(t['cp-never'])} runs each, medians:")
for k in ["posgrid-durable", "posgrid-nosync", "posgrid-dryrun", "cp-never", "cp-never-sync", "cp-reflink", "cp-reflink-sync"]:
    print(f"  {k:16} {med[k] * 1000:9.1f} ms   (runs: {', '.join(f'{x * 1000:.1f}' for x in t[k])})")
d, n, tables = med["posgrid-durable"], med["posgrid-nosync"], med["posgrid-dryrun"]
print(f"sync cost (durable - no-sync, medians):             {(d - n) * 1000:+.1f} ms")
if sys.argv[6] != "none":
    print(f"sync cost (the fsync calls of one durable resize, strace): {sys.argv[6]} ms")
print(f"durable resize / durable plain copy (cp + sync):    {d / med['cp-never-sync']:.4f}  (target <= 0.02)")
print(f"no-sync resize / plain copy left in the page cache: {n / med['cp-never']:.4f}")
print(f"durable resize / (cp --reflink=always + tables):    {d / (med['cp-reflink'] + tables):.2f}    (target <= 3)")
print(f"durable resize / (cp --reflink=always + sync + tables): {d / (med['cp-reflink-sync'] + tables):.2f}")
for k in ["posgrid-durable", "cp-never", "cp-reflink"]:
    print(f"new disk, {k:16} {disk[k] / 2**20:9.2f} MiB  ({100 * disk[k] / size:.3f}% of the file)")
print(f"new disk of the resize / file size:        {disk['posgrid-durable'] / size:.4f}  (target <= 0.01)")
print(f"posgrid's own report: bytes_shared {shared}, bytes_copied {copied} ({100 * shared / (shared + copied):.2f}% shared)")
PY
