//! Medians of repeated timings, shared by the benchmarks.

use std::time::{Duration, Instant};

/// Median wall time of `f` over enough repetitions to fill about `budget`.
pub fn median(budget: Duration, mut f: impl FnMut()) -> Duration {
    for _ in 0..3 {
        f();
    }
    let mut samples = Vec::new();
    let start = Instant::now();
    while samples.len() < 15 || (start.elapsed() < budget && samples.len() < 2000) {
        let t = Instant::now();
        f();
        samples.push(t.elapsed());
    }
    samples.sort();
    samples[samples.len() / 2]
}
