#!/usr/bin/env bash
# Two hadal binaries in turn on the same work: whole-process runs of the
# hot-start demo and 10,000-member ensembles, alternating so that a change
# of the machine's speed falls on both. Prints medians, every run, and the
# ratio second / first.
#
#     bash benches/versus.sh OLD_BINARY NEW_BINARY [ROUNDS]
set -euo pipefail
[ $# -ge 2 ] || { echo "usage: bash benches/versus.sh OLD_BINARY NEW_BINARY [ROUNDS]" >&2; exit 2; }
old=$(realpath "$1"); new=$(realpath "$2"); rounds=${3:-15}
cd "$(dirname "$0")/.."
work=$(mktemp -d)
trap 'rm -rf "$work"' EXIT
mkdir -p "$work/project/.git"
cp -r scenarios "$work/project/"
cd "$work/project"

seconds() {
    local s e
    s=$(date +%s.%N)
    "$@" >/dev/null 2>&1
    e=$(date +%s.%N)
    echo "$e - $s" | bc -l
}
median() { sort -g | awk '{v[NR] = $1} END {print v[int((NR + 1) / 2)]}'; }

for what in run ensemble; do
    : >"$work/old"; : >"$work/new"
    for _ in $(seq 1 "$rounds"); do
        for side in old new; do
            bin=$old; [ $side = new ] && bin=$new
            if [ $what = run ]; then
                seconds "$bin" run scenarios/hot_start.hadal --no-cache --no-plots --out "$work/out-$side" >>"$work/$side"
            else
                seconds "$bin" ensemble scenarios/hot_start.hadal --members 10000 --threads 2 \
                    --no-cache --no-plots --out "$work/ens-$side" >>"$work/$side"
            fi
        done
    done
    mo=$(median <"$work/old"); mn=$(median <"$work/new")
    printf '%s: old median %.4f s, new median %.4f s, new/old %.3f\n' "$what" "$mo" "$mn" "$(echo "$mn / $mo" | bc -l)"
    echo "  old: $(tr '\n' ' ' <"$work/old")"
    echo "  new: $(tr '\n' ' ' <"$work/new")"
done
