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
# run reports for its stages, "parse+check" the median of three `hadal check`
# processes on the same file (for the generated long files, seven, and the
# in-process medians of benches/parse.rs beside them), peak memory the largest resident set
# (/usr/bin/time -v). Outputs are written to /dev/shm when it exists. The
# growth columns give the exponent k of time ~ size^k
# between neighbouring sizes (1 is linear). Figures also go to
# target/scaling/summary.json.
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)
RUNS=${SCALING_RUNS:-3}
echo "building (release) ..." >&2
cargo build --release --quiet
gen=$root/benches/scaling/generate.py
out=$root/target/scaling
mkdir -p "$out"
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
# Outputs go to a memory file system when there is one: the runs write up to
# 190 MB each, and on a disk shared with other work the durable writes
# (fsync) would measure the disk's queue rather than hadal.
work=$tmp
if [ -d /dev/shm ] && w=$(mktemp -d -p /dev/shm hadal-scaling.XXXXXX 2>/dev/null); then
    work=$w
    trap 'rm -rf "$tmp" "$work"' EXIT
fi
# the in-process parse-and-check benchmark (benches/parse.rs)
parse_exe=$(cargo bench --bench parse --no-run --message-format=json 2>/dev/null | python3 -c '
import json, sys
for line in sys.stdin:
    m = json.loads(line)
    if m.get("reason") == "compiler-artifact" and m.get("executable") and m["target"]["name"] == "parse":
        print(m["executable"])')
[ -x "$parse_exe" ] || { echo "scaling.sh: could not build benches/parse.rs" >&2; exit 2; }
# copies, so a rebuild by someone else mid-run cannot change what is measured
cp "$root/target/release/hadal" "$tmp/hadal"
cp "$parse_exe" "$tmp/parse-bench"
H=$tmp/hadal
: >"$out/runs.jsonl"

# run_one LABEL FILE: RUNS whole-process runs of `hadal run`, one JSON line
# per configuration into runs.jsonl
run_one() {
    local label=$1 file=$2 i walls=() rss=0
    for ((i = 0; i < RUNS; i++)); do
        local s e r
        s=$(date +%s%N)
        /usr/bin/time -v -o "$tmp/time.txt" "$H" run "$file" --no-cache --json --out "$work/out" >"$tmp/run.json"
        e=$(date +%s%N)
        walls+=("$(((e - s) / 1000))")
        r=$(awk -F': ' '/Maximum resident set size/ {print $2}' "$tmp/time.txt")
        ((r > rss)) && rss=$r
        # one run is enough to know a size is slow
        (((e - s) > 20000000000)) && break
    done
    # parse and check alone, the same file
    local checks=()
    for ((i = 0; i < 3; i++)); do
        local s e
        s=$(date +%s%N)
        "$H" check "$file" >/dev/null
        e=$(date +%s%N)
        checks+=("$(((e - s) / 1000))")
    done
    python3 - "$label" "$file" "$tmp/run.json" "$rss" "${checks[*]}" "${walls[@]}" >>"$out/runs.jsonl" <<'EOF'
import json, statistics, sys
label, file, run, rss, checks = sys.argv[1:6]
walls = [int(w) / 1e6 for w in sys.argv[6:]]
checks = [int(c) / 1e6 for c in checks.split()]
r = json.load(open(run))
stages = r["stages"]
switched = sum(1 for s in stages if s["method"].startswith("explicit, then implicit"))
implicit = sum(1 for s in stages if s["method"] == "implicit")
if implicit == len(stages):
    method = "implicit"
elif switched or implicit:
    method = f"explicit, implicit in {switched + implicit} of {len(stages)} stages"
else:
    method = "explicit"
print(json.dumps({
    "label": label,
    "lines": sum(1 for _ in open(file)),
    "wall_s": statistics.median(walls),
    "check_s": statistics.median(checks),
    "runs": len(walls),
    "solve_s": sum(s["wall_ms"] for s in stages) / 1e3,
    "peak_mb": int(rss) / 1024,
    "steps": sum(s["accepted_steps"] + s["rejected_steps"] for s in stages),
    "rhs": sum(s["rhs_evaluations"] for s in stages),
    "rows": r["rows"],
    "stages": len(stages),
    "method": method,
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
    inproc=$("$tmp/parse-bench" "$f")
    python3 - "$f" "$rss" "$inproc" "${ts[@]}" >>"$out/check.jsonl" <<'EOF'
import json, statistics, sys
f, rss, inproc = sys.argv[1:4]
t = [int(x) / 1e6 for x in sys.argv[4:]]
ip = json.loads(inproc)
print(json.dumps({"lines": sum(1 for _ in open(f)), "wall_s": statistics.median(t), "peak_mb": int(rss) / 1024,
                  "in_process_parse_s": ip["parse_s"], "in_process_check_s": ip["check_s"]}))
EOF
    echo "  $(tail -1 "$out/check.jsonl")" >&2
done

where=disk
[ "$work" != "$tmp" ] && where="tmpfs (/dev/shm)"
python3 - "$out" "$(nproc)" "$(free -g | awk '/^Mem:/ {print $2}')" "$(date -u +%Y-%m-%d)" "$where" <<'EOF'
import json, math, os, sys

out, cores, mem, date, where = sys.argv[1:6]
runs = {r["label"]: r for r in map(json.loads, open(os.path.join(out, "runs.jsonl")))}
checks = [json.loads(l) for l in open(os.path.join(out, "check.jsonl"))]


def t(s):
    return f"{s:.2f} s" if s >= 1 else f"{s * 1e3:.1f} ms" if s >= 0.01 else f"{s * 1e3:.2f} ms"


def k(a, b, xa, xb):
    if a <= 0 or b <= 0:
        return "n/a"
    return f"{math.log(b / a) / math.log(xb / xa):.2f}"


print(f"hadal scaling, {date}, {cores} cores, {mem} GiB, outputs written to {where}")
print("Growth: exponent k of wall / solve / peak memory ~ size^k against the next smaller size (1 is linear).")
print("| reservoirs | span | stages | rows | method | steps | parse+check | solve | wall (whole run) | peak memory "
      "| growth vs reservoirs | growth vs span |")
print("|---|---|---|---|---|---|---|---|---|---|---|---|")


def growth(p, r, xp, xr):
    return " / ".join(k(p[q], r[q], xp, xr) for q in ("wall_s", "solve_s", "peak_mb"))


spans = ("0.5", "4.5", "45")
for n in (10, 100, 1000):
    for span in spans:
        r = runs[f"auto {n} {span}"]
        gn = growth(runs[f"auto {n // 10} {span}"], r, n // 10, n) if n > 10 else ""
        i = spans.index(span)
        gs = growth(runs[f"auto {n} {spans[i - 1]}"], r, float(spans[i - 1]), float(span)) if i else ""
        print(f"| {n} | {span} Gyr | {r['stages']} | {r['rows']} | {r['method']} | {r['steps']} | {t(r['check_s'])} "
              f"| {t(r['solve_s'])} | {t(r['wall_s'])} | {r['peak_mb']:.0f} MB | {gn} | {gs} |")
for n in (10, 100, 1000):
    r = runs[f"implicit {n} 4.5"]
    gn = growth(runs[f"implicit {n // 10} 4.5"], r, n // 10, n) if n > 10 else ""
    print(f"| {n} | 4.5 Gyr | {r['stages']} | {r['rows']} | implicit (forced) | {r['steps']} | {t(r['check_s'])} "
          f"| {t(r['solve_s'])} | {t(r['wall_s'])} | {r['peak_mb']:.0f} MB | {gn} | |")
print()
print("| parse and check | wall (whole process) | in-process: parse / parse+check | peak memory | k vs lines | target |")
print("|---|---|---|---|---|---|")
for i, c in enumerate(checks):
    kk = k(checks[i - 1]["wall_s"], c["wall_s"], checks[i - 1]["lines"], c["lines"]) if i else ""
    target = ""
    if c["lines"] >= 10000:
        target = "met (< 100 ms)" if c["wall_s"] < 0.1 else f"gap: {t(c['wall_s'])} (target 100 ms)"
    print(f"| {c['lines']} lines | {t(c['wall_s'])} | {t(c['in_process_parse_s'])} / {t(c['in_process_check_s'])} "
          f"| {c['peak_mb']:.0f} MB | {kk} | {target} |")
json.dump({"date": date, "cores": int(cores), "memory_gib": int(mem), "outputs": where, "runs": runs, "check": checks},
          open(os.path.join(out, "summary.json"), "w"), indent=2)
EOF
