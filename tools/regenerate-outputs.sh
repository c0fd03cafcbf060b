#!/usr/bin/env bash
# Regenerate the committed results in outputs/ from every scenario in
# scenarios/, from scratch (no cache). Run from anywhere; review the diff
# (`git diff --stat outputs/`) before committing: a change in numbers is a
# change in results.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet
for f in scenarios/*.hadal; do
    ./target/release/hadal run "$f" --no-cache >/dev/null
    echo "regenerated from $f"
done
# The demo ensemble (the study block of the hot-start scenario).
./target/release/hadal ensemble scenarios/hot_start.hadal --no-cache >/dev/null
echo "regenerated outputs/mirrowen_hot_start_ensemble"
# One-page reports (figures are drawn by run and ensemble themselves).
for d in outputs/*/; do
    ./target/release/hadal report "$d" >/dev/null
done
./target/release/hadal verify outputs/*/manifest.json
