//! A slice of the hostile corpus in `cargo test`: two cases of every family
//! (the whole corpus runs in CI: `cargo run --release --example hostile`).
//! Each case runs the debug binary in a project of its own and must end by
//! itself with exit code 0, 1 or 2, without a panic, within the time bound
//! and under 1 GiB of peak memory.

#![cfg(unix)]

#[path = "support/hostile.rs"]
mod hostile;

use std::path::Path;
use std::time::Duration;

#[test]
fn two_cases_of_every_hostile_family_end_cleanly_within_their_bounds() {
    let bin = Path::new(env!("CARGO_BIN_EXE_hadal"));
    let work = tempfile::tempdir().unwrap();
    // The debug binary is slower than the release one CI runs the corpus
    // with; the bound still catches hangs (a FIFO read blocks forever).
    let bounds = hostile::Bounds {
        time: Duration::from_secs(60),
        ..hostile::Bounds::default()
    };
    let mut failures = Vec::new();
    for index in 0..2 * hostile::FAMILIES {
        let case = hostile::generate(7, index);
        let dir = work.path().join(format!("case-{index}"));
        let outcome = hostile::run_case(bin, &dir, &case, &bounds);
        if let Some(why) = hostile::judge(&outcome, &bounds) {
            let mut text = Vec::new();
            hostile::record_failure(&mut text, &case, &outcome, &why);
            failures.push(String::from_utf8_lossy(&text).into_owned());
        }
        let _ = std::fs::remove_dir_all(&dir);
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

#[test]
fn the_judge_catches_what_it_must() {
    // The corpus is only as good as its verdicts: a signal, a panic, an
    // undocumented exit code, a timeout and a memory overrun each fail.
    let bounds = hostile::Bounds::default();
    let clean = hostile::Outcome {
        code: Some(2),
        signal: None,
        timed_out: false,
        peak_kib: 10_000,
        elapsed: Duration::from_millis(5),
        stderr: "error: no such file".into(),
    };
    assert_eq!(hostile::judge(&clean, &bounds), None);
    let bad = [
        hostile::Outcome {
            code: None,
            signal: Some(6),
            ..clean.clone()
        },
        hostile::Outcome {
            code: Some(101),
            stderr: "thread 'main' panicked at src/x.rs".into(),
            ..clean.clone()
        },
        hostile::Outcome {
            code: Some(3),
            ..clean.clone()
        },
        hostile::Outcome {
            timed_out: true,
            ..clean.clone()
        },
        hostile::Outcome {
            peak_kib: 2 * 1024 * 1024,
            ..clean.clone()
        },
    ];
    for o in &bad {
        assert!(hostile::judge(o, &bounds).is_some(), "{o:?}");
    }
    // And the corpus is the same for a seed, whatever order it is drawn in.
    let a = hostile::describe(&hostile::generate(1, 123));
    let _ = hostile::generate(1, 5);
    assert_eq!(a, hostile::describe(&hostile::generate(1, 123)));
}
