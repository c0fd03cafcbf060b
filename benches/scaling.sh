#!/usr/bin/env bash
# How hadal's time and memory grow with the size of a scenario: generated
# chains of 10, 100 and 1,000 reservoirs over 0.5, 4.5 and 45 Gyr (stages of
# 0.5 Gyr, a row every 10 Myr, a 25 Myr step limit: fixed cadence, so the
# work should grow linearly), the implicit method forced on the 4.5 Gyr
# chains, and parse and check of generated files of 1,250 to 10,000 lines.
#
#     bash benches/scaling.sh
#
# Scenarios come from benches/scaling/generate.py (not committed). Each run
# is a whole `hadal run --no-cache` process: wall time is the median of
# SCALING_RUNS runs (default 3; 1 for runs over 20 s), "solve" the time the
# run reports for its stages, peak memory the largest resident set
# (/usr/bin/time -v). The growth columns give the exponent k of time ~ size^k
# between neighbouring sizes (1 is linear). Figures also go to
# target/scaling/summary.json.
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)
RUNS=${SCALING_RUNS:-3}
echo "building (release) ..." >&2
cargo build --release --quiet
H=$root/target/release/hadal
gen=$root/benches/scaling/generate.py
out=$root/target/scaling
mkdir -p "$out"
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
: >"$out/runs.jsonl"

# run_one LABEL FILE: RUNS whole-process runs of `hadal run`, one JSON line
# per configuration into runs.jsonl
run_one() {
    local label=$1 file=$2 i walls=() rss=0
    for ((i = 0; i < RUNS; i++)); do
        /usr/bin/time -v -o "$tmp/time.txt" "$H" run "$file" --no-cache --json --out "$tmp/out" >"$tmp/run.json"
        walls+=("$(awk -F': ' '/Elapsed \(wall clock\)/ {n = split($2, p, ":"); s = 0; for (k = 1; k <= n; k++) s = s * 60 + p[k]; print s}' "$tmp/time.txt")")
        local r
        r=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$tmp/time.txt")
        ((r > rss)) && rss=$r
        # one run is enough to know a size is slow
        if (($(echo "${walls[-1]} > 20" | bc -l))); then break; fi
    done
    python3 - "$label" "$file" "$tmp/run.json" "$rss" "${walls[@]}" >>"$out/runs.jsonl" <<'EOF'
import json, statistics, sys
label, file, run, rss = sys.argv[1:5]
walls = [float(w) for w in sys.argv[5:]]
r = json.load(open(run))
stages = r["stages"]
methods = sorted({s["method"] for s in stages})
print(json.dumps({
    "label": label,
    "lines": sum(1 for _ in open(file)),
    "wall_s": statistics.median(walls),
    "runs": len(walls),
    "solve_s": sum(s["wall_ms"] for s in stages) / 1e3,
    "peak_mb": int(rss) / 1024,
    "steps": sum(s["accepted_steps"] + s["rejected_steps"] for s in stages),
    "rhs": sum(s["rhs_evaluations"] for s in stages),
    "rows": r["rows"],
    "stages": len(stages),
    "method": ", ".join(methods),
}))
EOF
    echo "  $label: $(tail -1 "$out/runs.jsonl")" >&2
}

echo "solves (auto method) ..." >&2
for n in 10 100 1000; do
    for span in 0.5 4.5 45; do
        f=$tmp/chain_${n}_${span}.hadal
        python3 "$gen" "$n" "$span" >"$f"
        run_one "auto $n $span" "$f"
    done
done
echo "solves (implicit method forced, 4.5 Gyr) ..." >&2
for n in 10 100 1000; do
    f=$tmp/implicit_${n}.hadal
    python3 "$gen" "$n" 4.5 --method implicit >"$f"
    run_one "implicit $n 4.5" "$f"
done

echo "parse and check ..." >&2
: >"$out/check.jsonl"
for lines in 1250 2500 5000 10000; do
    f=$tmp/lines_$lines.hadal
    python3 "$gen" --lines "$lines" >"$f"
    "$H" check "$f" >/dev/null # must be a valid scenario
    ts=()
    for i in 1 2 3 4 5 6 7; do
        s=$(date +%s%N)
        "$H" check "$f" >/dev/null
        e=$(date +%s%N)
        ts+=("$(((e - s) / 1000))")
    done
    /usr/bin/time -v -o "$tmp/time.txt" "$H" check "$f" >/dev/null
    rss=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$tmp/time.txt")
    python3 - "$f" "$rss" "${ts[@]}" >>"$out/check.jsonl" <<'EOF'
import json, statistics, sys
f, rss = sys.argv[1:3]
t = [int(x) / 1e6 for x in sys.argv[3:]]
print(json.dumps({"lines": sum(1 for _ in open(f)), "wall_s": statistics.median(t), "peak_mb": int(rss) / 1024}))
EOF
    echo "  $(tail -1 "$out/check.jsonl")" >&2
done

python3 - "$out" "$(nproc)" "$(free -g | awk '/^Mem:/ {print $2}')" "$(date -u +%Y-%m-%d)" <<'EOF'
import json, math, os, sys

out, cores, mem, date = sys.argv[1:5]
runs = {r["label"]: r for r in map(json.loads, open(os.path.join(out, "runs.jsonl")))}
checks = [json.loads(l) for l in open(os.path.join(out, "check.jsonl"))]


def t(s):
    return f"{s:.2f} s" if s >= 1 else f"{s * 1e3:.1f} ms" if s >= 0.01 else f"{s * 1e3:.2f} ms"


def k(a, b, xa, xb):
    if a <= 0 or b <= 0:
        return "n/a"
    return f"{math.log(b / a) / math.log(xb / xa):.2f}"


print(f"hadal scaling, {date}, {cores} cores, {mem} GiB")
print("| reservoirs | span | stages | rows | method | steps | wall | solve | peak memory | k(wall) vs reservoirs | k(solve) vs span |")
print("|---|---|---|---|---|---|---|---|---|---|---|")
for n in (10, 100, 1000):
    for span in ("0.5", "4.5", "45"):
        r = runs[f"auto {n} {span}"]
        kn = ""
        if n > 10:
            p = runs[f"auto {n // 10} {span}"]
            kn = k(p["wall_s"], r["wall_s"], n // 10, n)
        ks = ""
        if span != "0.5":
            p = runs[f"auto {n} {'0.5' if span == '4.5' else '4.5'}"]
            ks = k(p["solve_s"], r["solve_s"], float(p["label"].split()[2]), float(span))
        print(f"| {n} | {span} Gyr | {r['stages']} | {r['rows']} | {r['method']} | {r['steps']} | {t(r['wall_s'])} "
              f"| {t(r['solve_s'])} | {r['peak_mb']:.0f} MB | {kn} | {ks} |")
for n in (10, 100, 1000):
    r = runs[f"implicit {n} 4.5"]
    kn = ""
    if n > 10:
        p = runs[f"implicit {n // 10} 4.5"]
        kn = k(p["solve_s"], r["solve_s"], n // 10, n) + " (solve)"
    print(f"| {n} | 4.5 Gyr | {r['stages']} | {r['rows']} | implicit (forced) | {r['steps']} | {t(r['wall_s'])} "
          f"| {t(r['solve_s'])} | {r['peak_mb']:.0f} MB | {kn} | |")
print()
print("| parse and check | wall (whole process) | peak memory | k vs lines | target |")
print("|---|---|---|---|---|")
for i, c in enumerate(checks):
    kk = k(checks[i - 1]["wall_s"], c["wall_s"], checks[i - 1]["lines"], c["lines"]) if i else ""
    target = ""
    if c["lines"] >= 10000:
        target = "met (< 100 ms)" if c["wall_s"] < 0.1 else f"gap: {t(c['wall_s'])} (target 100 ms)"
    print(f"| {c['lines']} lines | {t(c['wall_s'])} | {c['peak_mb']:.0f} MB | {kk} | {target} |")
json.dump({"date": date, "cores": int(cores), "memory_gib": int(mem), "runs": runs, "check": checks},
          open(os.path.join(out, "summary.json"), "w"), indent=2)
EOF
