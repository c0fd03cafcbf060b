#!/usr/bin/env bash
# hadal side by side with its scripted peer (benches/peer/peer.py: the same
# equations by hand with scipy's solve_ivp), on the hot-start demo, in one
# run so the ratios hold on a noisy machine.
#
#     pip install scipy numpy      # the peer's only needs
#     bash benches/compare.sh
#
# Builds in release mode, then runs ROUNDS rounds (default 3) of every
# measurement, interleaved so a burst of load from other processes lands on
# both sides of a ratio rather than on one:
# - `cargo bench --bench solve` (in-process medians of hadal, and of the
#   hand-coded Rust baseline) and `cargo bench --bench cache` (in-process
#   rerun after an edit of the last stage, cache warm);
# - the peer (in-process medians of its own solve, imports excluded: full
#   solves and >= 100 members with varied parameters, LSODA and Radau);
# - whole processes timed with hyperfine (a loop when hyperfine is missing):
#   `hadal run` without cache, an edit of the late stage followed by
#   `hadal run` with a warm cache (both with outputs and cache on disk, and
#   again on tmpfs in /dev/shm, where hadal's durable writes cost nothing),
#   the peer rerun as a whole process, and `hadal ensemble` with 10,000
#   members (and 2,000 on one thread).
# The binaries are copied before the first round, so a rebuild by someone
# else mid-run cannot change what is measured. Prints one table: medians over
# the rounds, their ratios, the range of the ratio over the rounds, the
# targets of the issue and whether each is met. Raw figures go to
# target/compare/.
#
# Environment: ROUNDS (default 3), PEER_REPEATS (full solves per method and
# round, default 5), PEER_MEMBERS (members per method and round, default
# 100, at least 100).
set -euo pipefail
cd "$(dirname "$0")/.."
root=$(pwd)

if ! python3 -c 'import scipy, numpy' 2>/dev/null; then
    echo "compare.sh: the peer needs scipy and numpy: pip install scipy numpy" >&2
    exit 2
fi

ROUNDS=${ROUNDS:-3}
PEER_REPEATS=${PEER_REPEATS:-5}
PEER_MEMBERS=${PEER_MEMBERS:-100}

echo "building (release) ..." >&2
cargo build --release --quiet
bench_exe() { # NAME: build the benchmark and print the path of its executable
    cargo bench --bench "$1" --no-run --message-format=json 2>/dev/null | python3 -c '
import json, sys
for line in sys.stdin:
    m = json.loads(line)
    if m.get("reason") == "compiler-artifact" and m.get("executable") and m["target"]["name"] == sys.argv[1]:
        print(m["executable"])' "$1"
}
solve_exe=$(bench_exe solve)
cache_exe=$(bench_exe cache)
for e in "$solve_exe" "$cache_exe"; do
    [ -x "$e" ] || {
        echo "compare.sh: could not build the benchmarks (cargo bench --no-run)" >&2
        exit 2
    }
done
out=$root/target/compare
rm -rf "$out"
mkdir -p "$out"
tmp=$(mktemp -d)
trap 'rm -rf "$tmp"' EXIT
cp "$root/target/release/hadal" "$tmp/hadal"
cp "$solve_exe" "$tmp/bench_solve"
cp "$cache_exe" "$tmp/bench_cache"
H=$tmp/hadal

# A private copy of the demo (the edit below must not touch the repository),
# with its own stage cache.
mkdir -p "$tmp/demo"
cp -r scenarios/hot_start.hadal scenarios/shared "$tmp/demo/"
demo=$tmp/demo/hot_start.hadal
export HADAL_CACHE=$tmp/cache
"$H" run "$demo" --out "$tmp/edit" >/dev/null # fills the cache

# The same on a memory file system, where hadal's durable writes (each
# output file and its directory are synced) cost nothing: what remains is
# hadal's own work. Only when /dev/shm is there and writable.
shm=""
if [ -d /dev/shm ] && shm=$(mktemp -d -p /dev/shm hadal-compare.XXXXXX 2>/dev/null); then
    trap 'rm -rf "$tmp" "$shm"' EXIT
    mkdir -p "$shm/demo"
    cp -r scenarios/hot_start.hadal scenarios/shared "$shm/demo/"
    HADAL_CACHE=$shm/cache "$H" run "$shm/demo/hot_start.hadal" --out "$shm/edit" >/dev/null
else
    shm=""
fi

# The edit: a new value of the late stage's parameter on every call.
cat >"$tmp/edit.sh" <<EOF
#!/usr/bin/env bash
# usage: edit.sh SCENARIO
n=\$(( \$(cat "$tmp/edits" 2>/dev/null || echo 0) + 1 ))
echo \$n >"$tmp/edits"
sed -i "s/^param late_regassing_efficiency = .*/param late_regassing_efficiency = 0.45\$(printf '%06d' \$n)/" "\$1"
EOF

# time_cmd NAME RUNS WARMUP [--prepare CMD] -- CMD...: append the wall
# seconds of RUNS runs of CMD to $out/NAME.times (one a line).
have_hyperfine=0
command -v hyperfine >/dev/null && have_hyperfine=1
time_cmd() {
    local name=$1 runs=$2 warmup=$3
    shift 3
    local prepare=""
    if [ "$1" = "--prepare" ]; then
        prepare=$2
        shift 2
    fi
    shift # --
    if [ $have_hyperfine = 1 ]; then
        local p=()
        [ -n "$prepare" ] && p=(--prepare "$prepare")
        hyperfine -N --style none --warmup "$warmup" --runs "$runs" "${p[@]}" \
            --export-json "$tmp/hf.json" "$*" >/dev/null 2>&1
        python3 -c 'import json, sys
r = json.load(open(sys.argv[1]))["results"][0]
open(sys.argv[2], "a").write("".join(f"{t}\n" for t in r["times"]))
open(sys.argv[3], "a").write(str(r["user"] + r["system"]) + "\n")' "$tmp/hf.json" "$out/$name.times" "$out/$name.cpu"
    else
        local i
        for ((i = 0; i < warmup + runs; i++)); do
            [ -n "$prepare" ] && $prepare
            local s e
            s=$(date +%s%N)
            "$@" >/dev/null 2>&1
            e=$(date +%s%N)
            ((i >= warmup)) && echo "$(((e - s) / 1000)) 1e6" | awk '{print $1 / $2}' >>"$out/$name.times"
        done
    fi
}

for ((round = 1; round <= ROUNDS; round++)); do
    echo "round $round of $ROUNDS: cargo bench --bench solve ..." >&2
    "$tmp/bench_solve" >"$out/bench_solve.$round.txt"
    echo "round $round: cargo bench --bench cache ..." >&2
    "$tmp/bench_cache" >"$out/bench_cache.$round.txt"
    echo "round $round: the peer, in-process ($PEER_REPEATS full solves, $PEER_MEMBERS members per method) ..." >&2
    python3 benches/peer/peer.py --repeats "$PEER_REPEATS" --members "$PEER_MEMBERS" >"$out/peer.$round.json"
    echo "round $round: hadal run; edit and rerun; the peer as a whole process ..." >&2
    time_cmd run_no_cache 10 2 -- "$H" run "$demo" --no-cache --out "$tmp/run"
    time_cmd edit_rerun 10 2 --prepare "bash $tmp/edit.sh $demo" -- "$H" run "$demo" --out "$tmp/edit"
    if [ -n "$shm" ]; then
        export HADAL_CACHE=$shm/cache
        time_cmd run_no_cache_tmpfs 10 2 -- "$H" run "$shm/demo/hot_start.hadal" --no-cache --out "$shm/run"
        time_cmd edit_rerun_tmpfs 10 2 --prepare "bash $tmp/edit.sh $shm/demo/hot_start.hadal" \
            -- "$H" run "$shm/demo/hot_start.hadal" --out "$shm/edit"
        export HADAL_CACHE=$tmp/cache
    fi
    time_cmd peer_once 2 1 -- python3 benches/peer/peer.py --once "$tmp/peer.csv" --methods LSODA
    echo "round $round: hadal ensemble, 10,000 members; 2,000 members on one thread ..." >&2
    time_cmd ensemble_10000 1 0 -- "$H" ensemble "$demo" --members 10000 --no-cache --out "$tmp/ens"
    time_cmd ensemble_2000_1t 1 0 -- "$H" ensemble "$demo" --members 2000 --threads 1 --no-cache --out "$tmp/ens1"
done

# The timed reruns did what they claim: early and middle stages reused, the
# late one solved again.
check_edit() { # SCENARIO OUT CACHE
    bash "$tmp/edit.sh" "$1"
    HADAL_CACHE=$3 "$H" run "$1" --out "$2" --json >"$out/edit_check.json"
    python3 - "$out/edit_check.json" <<'EOF'
import json, sys
st = {s["name"]: s["status"] for s in json.load(open(sys.argv[1]))["stages"]}
want = {"early": "reused", "middle": "reused", "late": "computed"}
if st != want:
    sys.exit(f"compare.sh: after an edit of the late stage the stages were {st}, expected {want}")
EOF
}
check_edit "$demo" "$tmp/edit" "$tmp/cache"
if [ -n "$shm" ]; then check_edit "$shm/demo/hot_start.hadal" "$shm/edit" "$shm/cache"; fi

python3 - "$out" "$ROUNDS" "$(nproc)" "$(free -g | awk '/^Mem:/ {print $2}')" "$(date -u +%Y-%m-%d)" <<'EOF'
import json, os, re, statistics, sys

out, rounds, cores, mem_gib, date = sys.argv[1], int(sys.argv[2]), sys.argv[3], sys.argv[4], sys.argv[5]
med = statistics.median


def bench_s(text, label):
    m = re.search(re.escape(label) + r"\s+([0-9.]+) ms", text)
    if not m:
        sys.exit(f"compare.sh: no `{label}` in the output of the solve benchmark")
    return float(m.group(1)) / 1e3


def times(name):
    path = os.path.join(out, name + ".times")
    return [float(x) for x in open(path)] if os.path.exists(path) else None


def cpu(name):
    path = os.path.join(out, name + ".cpu")
    return med([float(x) for x in open(path)]) if os.path.exists(path) else None


def per_round(xs):
    """Medians of a command's samples, round by round (each round adds the
    same number of samples)."""
    n = len(xs) // rounds
    return [med(xs[i * n:(i + 1) * n]) for i in range(rounds)]


bench = [open(os.path.join(out, f"bench_solve.{r}.txt")).read() for r in range(1, rounds + 1)]
peers = [json.load(open(os.path.join(out, f"peer.{r}.json"))) for r in range(1, rounds + 1)]
cache_b = [open(os.path.join(out, f"bench_cache.{r}.txt")).read() for r in range(1, rounds + 1)]


def cache_edit_s(text):
    """The hot-start demo's last-stage edit from `cargo bench --bench cache`."""
    m = re.search(r"hot_start:.*?last-stage edit\s+([0-9.]+) ms", text, re.S)
    if not m:
        sys.exit("compare.sh: no hot_start `last-stage edit` in the output of the cache benchmark")
    return float(m.group(1)) / 1e3


edit_ip_r = [cache_edit_s(b) for b in cache_b]
full_r = [bench_s(b, "full solve (compile, events, 451 rows)") for b in bench]
compiled_r = [bench_s(b, "compiled scenario, interpreted, integration") for b in bench]
hand_r = [bench_s(b, "hand-coded Rust, same integrator") for b in bench]
native_r = [bench_s(b, "compiled scenario as native code") for b in bench]
hand_n_r = [bench_s(b, "hand-coded Rust (sampled beside native)") for b in bench]
pfull = {m: [p["full_solve_s"][m]["median"] for p in peers] for m in ("LSODA", "Radau")}
pmember = {m: [p["per_member_s"][m]["mean"] for p in peers] for m in ("LSODA", "Radau")}
once_r = per_round(times("peer_once"))
ens_r, ens1_r = times("ensemble_10000"), times("ensemble_2000_1t")

full, compiled, hand = med(full_r), med(compiled_r), med(hand_r)
native, hand_n = med(native_r), med(hand_n_r)
once, ens, ens1 = med(once_r), med(ens_r), med(ens1_r)
lf, rf = med(pfull["LSODA"]), med(pfull["Radau"])
lm, rm = med(pmember["LSODA"]), med(pmember["Radau"])


def t(s):
    if s >= 10:
        return f"{s:.1f} s"
    if s >= 1:
        return f"{s:.2f} s"
    if s >= 0.1:
        return f"{s * 1e3:.0f} ms"
    if s >= 0.01:
        return f"{s * 1e3:.1f} ms"
    return f"{s * 1e3:.2f} ms"


def x(r):
    return f"{r:.0f}x" if r >= 100 else f"{r:.1f}x" if r >= 10 else f"{r:.2f}x"


def ratio(a, b, a_r=None, b_r=None):
    """a / b, with its range over the rounds when both sides have rounds."""
    s = x(a / b)
    if a_r and b_r:
        rs = [p / q for p, q in zip(a_r, b_r)]
        s += f" ({x(min(rs))} to {x(max(rs))})"
    return s


def at_least(r, target):
    return "met" if r >= target else f"gap: {x(r)} of {x(target)}"


rows = []  # what, hadal, peer LSODA, ratio, peer Radau, ratio, target, verdict
rows.append(["1. one full solve, in-process", t(full), t(lf), ratio(lf, full, pfull["LSODA"], full_r), t(rf),
             ratio(rf, full, pfull["Radau"], full_r), ">= 30x", at_least(lf / full, 30)])
for tag, where in (("", "outputs and cache on disk"), ("_tmpfs", "outputs and cache on tmpfs")):
    run_t = times("run_no_cache" + tag)
    if run_t is None:
        continue
    run, c = med(run_t), cpu("run_no_cache" + tag)
    cpu_s = f" (CPU {t(c)})" if c is not None else ""
    rows.append([f"2. `hadal run` whole process, no cache, {where}; peer: whole process (`peer.py --once`)",
                 t(run) + cpu_s, t(once), ratio(once, run, once_r, per_round(run_t)), "", "", "< 50 ms",
                 "met" if run < 0.05 else f"gap: {t(run)} (target 50 ms)"])
edit_ip = med(edit_ip_r)
rows.append(["3. edit of the late stage, rerun in-process (cache warm, `cargo bench --bench cache`); "
             "peer: full rerun in-process", t(edit_ip), t(lf), ratio(lf, edit_ip, pfull["LSODA"], edit_ip_r), t(rf),
             ratio(rf, edit_ip, pfull["Radau"], edit_ip_r), ">= 300x", at_least(lf / edit_ip, 300)])
for tag, where in (("", "on disk"), ("_tmpfs", "on tmpfs")):
    edit_t = times("edit_rerun" + tag)
    if edit_t is None:
        continue
    edit, c, edit_r = med(edit_t), cpu("edit_rerun" + tag), per_round(edit_t)
    cpu_s = f" (CPU {t(c)})" if c is not None else ""
    rows.append([f"3. edit of the late stage + `hadal run` (cache warm), whole process, {where}; "
                 "peer: full rerun in-process", t(edit) + cpu_s, t(lf), ratio(lf, edit, pfull["LSODA"], edit_r),
                 t(rf), ratio(rf, edit, pfull["Radau"], edit_r), ">= 300x", at_least(lf / edit, 300)])
    rows.append([f"3b. the same, {where}; peer: full rerun as a whole process", t(edit), t(once),
                 ratio(once, edit, once_r, edit_r), "", "", ">= 300x", at_least(once / edit, 300)])
rows.append([f"4. 10,000 members, {cores} threads; peer: per member x 10,000, one core", t(ens), t(lm * 10000),
             ratio(lm * 10000, ens, [m * 10000 for m in pmember["LSODA"]], ens_r), t(rm * 10000),
             ratio(rm * 10000, ens, [m * 10000 for m in pmember["Radau"]], ens_r), ">= 100x",
             at_least(lm * 10000 / ens, 100)])
rows.append(["4b. per member, one core each (hadal: 2,000 members on 1 thread)", t(ens1 / 2000), t(lm),
             ratio(lm, ens1 / 2000, pmember["LSODA"], [e / 2000 for e in ens1_r]), t(rm),
             ratio(rm, ens1 / 2000, pmember["Radau"], [e / 2000 for e in ens1_r]), "", ""])
rows.append(["5. compiled scenario, interpreted (`hadal run`), vs hand-coded Rust (integration only)", t(compiled),
             "hand-coded: " + t(hand), ratio(compiled, hand, compiled_r, hand_r), "", "", "<= 1.5x",
             "met" if compiled / hand <= 1.5 else f"gap: {compiled / hand:.2f}x (target 1.5x)"])
rows.append(["5b. compiled scenario as native code (ensembles) vs hand-coded Rust", t(native),
             "hand-coded: " + t(hand_n), ratio(native, hand_n, native_r, hand_n_r), "", "", "<= 1.5x",
             "met" if native / hand_n <= 1.5 else f"gap: {native / hand_n:.2f}x (target 1.5x)"])

head = ["what", "hadal", "peer LSODA", "ratio (range over rounds)", "peer Radau", "ratio", "target",
        "verdict (against the faster peer)"]
p0 = peers[0]
print(f"hadal vs the scipy peer, hot-start demo, {date}, {cores} cores, {mem_gib} GiB, medians of {rounds} rounds "
      f"(scipy {p0['scipy']}, numpy {p0['numpy']}, python {p0['python']})")
print("| " + " | ".join(head) + " |")
print("|" + "---|" * len(head))
for r in rows:
    print("| " + " | ".join(r) + " |")
print(f"peer per round: median of {p0['repeats']} in-process full solves per method, mean over {p0['members']} "
      f"members with varied parameters; right-hand sides per full solve: LSODA {p0['rhs_evaluations']['LSODA']}, "
      f"Radau {p0['rhs_evaluations']['Radau']}")
raw = {n: times(n) for n in ("run_no_cache", "run_no_cache_tmpfs", "edit_rerun", "edit_rerun_tmpfs", "peer_once",
                             "ensemble_10000", "ensemble_2000_1t")}
summary = {"date": date, "cores": int(cores), "memory_gib": int(mem_gib), "rounds": rounds,
           "rows": [dict(zip(head, r)) for r in rows],
           "seconds": dict(raw, hadal_edit_in_process=edit_ip_r, hadal_full_solve=full_r, hadal_compiled_integration=compiled_r, hand_coded=hand_r, hadal_native_integration=native_r, hand_coded_beside_native=hand_n_r,
                           peer_full=pfull, peer_member_mean=pmember)}
json.dump(summary, open(os.path.join(out, "summary.json"), "w"), indent=2)
EOF
