#!/usr/bin/env bash
# Ensemble benchmark on the hot-start demo: throughput, thread scaling, peak
# memory against member count, and the gain from sharing early stages.
#
#     bash benches/ensemble.sh
#
# Prints medians of three runs (wall time) and peak resident memory.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
H=./target/release/hadal
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT

# A copy of the demo whose study varies only a late-stage parameter.
late="$tmp/late_only.hadal"
mkdir -p "$tmp/shared"
cp scenarios/shared/* "$tmp/shared/"
awk '/^  vary /{next} {print} /^  seed = /{print "  vary late_regassing_efficiency ~ uniform(0.3, 0.6)"}' \
    scenarios/hot_start.hadal > "$late"

# median wall seconds of three runs of "$@"
median() {
    local times=()
    for _ in 1 2 3; do
        local s e
        s=$(date +%s.%N)
        "$@" >/dev/null
        e=$(date +%s.%N)
        times+=("$(echo "$e - $s" | bc -l)")
    done
    printf '%s\n' "${times[@]}" | sort -g | sed -n 2p
}

peak_mb() {
    /usr/bin/time -v "$@" 2>&1 >/dev/null | awk '/Maximum resident set size/ {printf "%.1f", $6 / 1024}'
}

n=10000
t2=$(median $H ensemble scenarios/hot_start.hadal --members $n --threads 2 --no-cache --out "$tmp/a")
t1=$(median $H ensemble scenarios/hot_start.hadal --members 2000 --threads 1 --no-cache --out "$tmp/b")
t1b=$(median $H ensemble scenarios/hot_start.hadal --members 2000 --threads 2 --no-cache --out "$tmp/c")
m1=$(peak_mb $H ensemble scenarios/hot_start.hadal --members 1000 --threads 2 --no-cache --out "$tmp/d")
m10=$(peak_mb $H ensemble scenarios/hot_start.hadal --members 10000 --threads 2 --no-cache --out "$tmp/e")
all=$(median $H ensemble "$late" --members 2000 --threads 2 --no-cache --out "$tmp/f")
# The same members with sharing switched off: vary the late parameter and
# an early one that does not change the result (a delivery e-folding time of
# an already negligible source would still count as varied).
nosh="$tmp/no_share.hadal"
awk '{print} /^  seed = /{print "  vary q_u235 ~ uniform(0.32 TW, 0.32 TW + 1e-9 TW)"}' "$late" > "$nosh"
noshare=$(median $H ensemble "$nosh" --members 2000 --threads 2 --no-cache --out "$tmp/g")

echo "ensemble benchmark, hot-start demo, $(nproc) cores, $(date -u +%Y-%m-%d)"
printf '  %-52s %8.2f s  %7.0f members/s\n' "10,000 members, 2 threads" "$t2" "$(echo "$n / $t2" | bc -l)"
printf '  %-52s %8.2f s\n' "2,000 members, 1 thread" "$t1"
printf '  %-52s %8.2f s  speed-up %.2fx\n' "2,000 members, 2 threads" "$t1b" "$(echo "$t1 / $t1b" | bc -l)"
printf '  %-52s %8s MB\n' "peak memory, 1,000 members" "$m1"
printf '  %-52s %8s MB\n' "peak memory, 10,000 members" "$m10"
printf '  %-52s %8.2f s\n' "2,000 members, only a late-stage parameter varies" "$all"
printf '  %-52s %8.2f s  sharing gain %.2fx\n' "same, with an early parameter varied too" "$noshare" "$(echo "$noshare / $all" | bc -l)"
