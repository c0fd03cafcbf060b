#!/usr/bin/env bash
# Crash trials: SIGKILL `hadal run` at random moments against a shared cache
# and output directory, then check that no cache entry is bad, no output is
# half-written, leftovers are cleaned, and the next run is byte-identical to
# a clean one; also 8 concurrent processes, and (as root) a full disk.
# See examples/crash.rs for every check.
#
#   tools/crash_test.sh                 # 100 trials
#   tools/crash_test.sh --trials 200 --seed 7
#   tools/crash_test.sh --ensemble      # also kill `hadal ensemble`
#
# Exit status 0 when every check passed; the work directory is kept (and
# printed) when one failed.
set -euo pipefail
cd "$(dirname "$0")/.."
cargo build --release --quiet --bin hadal --example crash
exec ./target/release/examples/crash --hadal ./target/release/hadal "$@"
