#!/usr/bin/env bash
# End-to-end throughput benchmark of issue 9: `scrim replay` against the serde_json parse
# floor on the same Quillhaven feed, with medians over several runs, peak RSS and the bytes
# per active unit of the contribution-bounding table. Prints a Markdown table.
#
# Usage: scripts/bench-replay.sh            (from anywhere inside the repository)
# Environment:
#   RUNS=5            runs of each program (interleaved, so load drift hits all alike)
#   LINES=2000000     feed lines (the issue asks for at least 2 million)
#   CARDS=200000      card population of the feed (the privacy units)
#   BENCH_DIR=...     where the feed and outputs go (default: $CARGO_TARGET_DIR/bench-replay)
#   CARGO_TARGET_DIR  as for cargo (default: target)
#
# What is measured, per run, with GNU time (`/usr/bin/time -v`):
#   floor   examples/parse_floor: read the file and deserialise every line with scrim's
#           LineParser::parse_serde (serde_json visitor) into scrim's Event, one thread,
#           nothing else (replay parses with LineParser::parse, the faster fast path with
#           identical results, so replay can approach or pass the floor)
#   replay  scrim replay --config config/demo.toml --seed 1 --threads N  (N = 1 and 2)
# events/s = feed lines / wall-clock seconds of the whole process; ratio = replay events/s
# over floor events/s. Releases of --threads 1 and 2 are compared byte for byte.
set -euo pipefail

repo=$(git -C "$(dirname "$0")" rev-parse --show-toplevel)
cd "$repo"
runs=${RUNS:-5}
lines=${LINES:-2000000}
cards=${CARDS:-200000}
target=${CARGO_TARGET_DIR:-target}
dir=${BENCH_DIR:-$target/bench-replay}
mkdir -p "$dir"

if [[ ! -x /usr/bin/time ]]; then
    echo "bench-replay: needs GNU time at /usr/bin/time (Debian/Ubuntu package 'time')" >&2
    exit 1
fi

echo "bench-replay: building release binaries" >&2
cargo build --release --quiet --bin scrim --example gen_feed --example parse_floor
scrim="$target/release/scrim"
floor="$target/release/examples/parse_floor"

feed="$dir/feed-$lines-$cards.jsonl"
if [[ ! -s "$feed" ]]; then
    echo "bench-replay: generating $feed" >&2
    "$target/release/examples/gen_feed" --out "$feed.tmp" --lines "$lines" --cards "$cards" --days 7
    mv "$feed.tmp" "$feed"
fi
n_lines=$(wc -l < "$feed")
feed_mib=$(( $(stat -c %s "$feed") / 1048576 ))
# Warm the page cache so every run reads the feed from memory.
cat "$feed" > /dev/null

# Runs a command under GNU time; appends "wall_s cpu_s rss_kib" to the file $1.
measure() {
    local out=$1
    shift
    local log="$dir/time.log"
    /usr/bin/time -v "$@" > "$dir/stdout.log" 2> "$log" || {
        echo "bench-replay: failed: $*" >&2
        cat "$log" >&2
        exit 1
    }
    awk -F': ' '
        /Elapsed \(wall clock\)/ { n = split($2, p, ":"); wall = 0; for (i = 1; i <= n; i++) wall = wall * 60 + p[i] }
        /User time \(seconds\)/ { cpu += $2 }
        /System time \(seconds\)/ { cpu += $2 }
        /Maximum resident set size/ { rss = $2 }
        END { printf "%.3f %.2f %d\n", wall, cpu, rss }' "$log" >> "$out"
}

: > "$dir/floor.txt"
: > "$dir/replay-1.txt"
: > "$dir/replay-2.txt"
load_before=$(cut -d' ' -f1-3 /proc/loadavg)
for run in $(seq 1 "$runs"); do
    echo "bench-replay: run $run of $runs" >&2
    measure "$dir/floor.txt" "$floor" "$feed"
    for threads in 1 2; do
        measure "$dir/replay-$threads.txt" "$scrim" replay --config config/demo.toml --seed 1 \
            --threads "$threads" --out "$dir/out-$threads" "$feed"
        cp "$dir/time.log" "$dir/replay-$threads.last.log"
    done
done
load_after=$(cut -d' ' -f1-3 /proc/loadavg)

if ! cmp -s "$dir/out-1/releases.jsonl" "$dir/out-2/releases.jsonl"; then
    echo "bench-replay: releases differ between --threads 1 and --threads 2" >&2
    exit 1
fi

# Median of column $2 of file $1.
median() {
    sort -n -k"$2","$2" "$1" | awk -v c="$2" '{ v[NR] = $c } END { print (NR % 2) ? v[(NR + 1) / 2] : (v[NR / 2] + v[NR / 2 + 1]) / 2 }'
}

floor_wall=$(median "$dir/floor.txt" 1)
# "scrim replay: unit table: N units, B bytes/unit" from the last run's stderr.
units_line=$(grep -h "unit table:" "$dir/replay-1.last.log" | tail -n1)
n_units=$(sed -E 's/.*unit table: ([0-9]+) units.*/\1/' <<< "$units_line")
bytes_per_unit=$(sed -E 's/.*units, ([0-9]+) bytes\/unit.*/\1/' <<< "$units_line")
table_mib=$(awk -v n="$n_units" -v b="$bytes_per_unit" 'BEGIN { printf "%.1f", n * b / 1048576 }')

# row NAME FILE TABLE_MIB: the floor has no unit table (0).
row() {
    local name=$1 file=$2 t=$3
    local wall cpu rss
    wall=$(median "$file" 1)
    cpu=$(median "$file" 2)
    rss=$(median "$file" 3)
    awk -v name="$name" -v n="$n_lines" -v w="$wall" -v fw="$floor_wall" -v cpu="$cpu" -v rss="$rss" -v t="$t" \
        'BEGIN { printf "| %s | %.0f | %.2f | %.2f | %.2f | %.1f | %.1f |\n", name, n / w, fw / w, w, cpu, rss / 1024, rss / 1024 - t }'
}

commit=$(git rev-parse --short HEAD)
dirty=$(git diff --quiet HEAD -- src benches examples Cargo.toml || echo " (uncommitted changes)")
echo
echo "Throughput on $(date -u +%Y-%m-%d), commit $commit$dirty, $(nproc) cores ($(grep -m1 'model name' /proc/cpuinfo | cut -d: -f2 | sed 's/^ *//')),"
echo "load average $load_before before and $load_after after. Feed: $n_lines lines ($feed_mib MiB), $cards cards,"
echo "7 days, seed 2026. Medians of $runs runs; events/s = lines / wall-clock seconds of the whole process."
echo
echo "| program | events/s | ratio to floor | wall s | CPU s | peak RSS MiB | RSS minus unit table MiB |"
echo "|---|---|---|---|---|---|---|"
row "parse floor (serde_json into Event, 1 thread)" "$dir/floor.txt" 0
row "scrim replay --threads 1" "$dir/replay-1.txt" "$table_mib"
row "scrim replay --threads 2" "$dir/replay-2.txt" "$table_mib"
echo
echo "Unit table at the end of the replay: $n_units active units, $bytes_per_unit bytes per active unit ($table_mib MiB)."
echo "Releases of --threads 1 and --threads 2: identical ($(wc -l < "$dir/out-1/releases.jsonl") records)."
