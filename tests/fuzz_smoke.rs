//! A small fuzz campaign in every `cargo test`: the same grammar-aware
//! mutations as `examples/fuzz.rs` (see `tests/support/fuzzer.rs`), over a
//! thousand inputs (about 40 s unoptimized), with no panic, no hang, no broken span, no
//! non-idempotent formatting and no NaN in a CSV.
//!
//! The long campaigns (a million inputs) run with the example:
//!
//!     nice -n 19 cargo run --release --example fuzz -- --count 1000000 --jobs 2

#[path = "support/fuzzer.rs"]
mod fuzzer;

use std::time::Duration;

fn assert_clean(report: &fuzzer::Report) {
    let failures: Vec<String> = report
        .failures
        .iter()
        .map(|f| format!("case {}: {}", f.index, f.what))
        .collect();
    assert!(
        failures.is_empty(),
        "{}\n{}\nreplay with: cargo run --release --example fuzz -- --seed S --start I --count 1",
        report.summary(),
        failures.join("\n")
    );
}

#[test]
fn a_thousand_mutated_inputs_pass_every_property() {
    let settings = fuzzer::Settings {
        seed: 20_240_601,
        count: 1_000,
        // Unoptimized code is slow, and other tests share the cores.
        hang_after: Duration::from_secs(20),
        hang_per_mb: Duration::from_secs(60),
        // Large inputs take seconds each unoptimized; the release campaign
        // and tests/limits.rs cover them.
        max_input_bytes: 64 * 1024,
        // A test thread's stack: deep recursions must grow their own.
        stack_bytes: 2 << 20,
        ..Default::default()
    };
    let report = fuzzer::run_parallel(&settings, 1, |_, _| {});
    assert_clean(&report);
    assert_eq!(report.cases + report.skipped, 1_000);
    assert!(report.skipped < 50, "{}", report.summary());
    // The mix must reach every phase, or the campaign proves little.
    assert!(report.parsed > 200, "{}", report.summary());
    assert!(report.checked > 100, "{}", report.summary());
    assert!(report.solved > 20, "{}", report.summary());
}

#[test]
fn generation_is_deterministic() {
    let corpus = fuzzer::Corpus::load();
    for i in [0u64, 1, 17, 999_999] {
        let a = fuzzer::make_case(&corpus, 7, i);
        let b = fuzzer::make_case(&corpus, 7, i);
        assert_eq!(a.scenario, b.scenario);
        assert_eq!(a.table, b.table);
        assert_eq!(a.include, b.include);
    }
    let a = fuzzer::make_case(&corpus, 7, 1);
    let b = fuzzer::make_case(&corpus, 8, 1);
    assert_ne!(a.scenario, b.scenario, "the seed must matter");
}

#[test]
fn the_properties_catch_a_broken_input_surface() {
    // The harness itself must be able to fail: a span outside its file is a
    // violation, not silently accepted.
    let mut sources = hadal::span::Sources::default();
    sources.add("x".into(), "x".into(), "abc".into());
    let bad = hadal::diagnostic::Problem::error("H0101", "m")
        .label(hadal::span::Span::new(0, 2, 10), "past the end");
    assert!(fuzzer::spans_are_valid(&sources, &[bad], "test").is_err());
    let good = hadal::diagnostic::Problem::error("H0101", "m")
        .label(hadal::span::Span::new(0, 0, 3), "all of it");
    assert!(fuzzer::spans_are_valid(&sources, &[good], "test").is_ok());
}
