//! Stage-cache benchmark: a cold run, an unchanged rerun and a rerun after
//! editing a parameter of the last stage only, in one process, on the demo
//! scenarios. Targets (issue: stage cache): an unchanged rerun costs at most
//! 10 % of the cold run; the edit costs at most the last stage's share of the
//! cold run plus 10 %.
//!
//!     cargo bench --bench cache

use std::hint::black_box;
use std::path::Path;
use std::time::{Duration, Instant};

use hadal::cache::Store;
use hadal::check::{check_file, CheckOptions};

fn median(mut v: Vec<Duration>) -> Duration {
    v.sort();
    v[v.len() / 2]
}

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let cases = [
        ("hot_start", "late_regassing_efficiency", "0.46"),
        ("glacial_window", "melt_time", "9 kyr"),
    ];
    println!(
        "stage cache, medians of 9 in-process runs of the pipeline (fingerprints, every stage, the series), cache in {}:",
        std::env::temp_dir().display()
    );
    for (name, late_param, value) in cases {
        let path = root.join(format!("scenarios/{name}.hadal"));
        let model = check_file(&path, &CheckOptions::default())
            .expect("checks")
            .model;
        let edited = if late_param.is_empty() {
            None
        } else {
            Some(
                check_file(
                    &path,
                    &CheckOptions {
                        overrides: vec![(late_param.to_owned(), value.to_owned())],
                    },
                )
                .expect("checks")
                .model,
            )
        };
        let (mut cold, mut warm, mut edit) = (Vec::new(), Vec::new(), Vec::new());
        let mut last_share = Vec::new();
        for _ in 0..9 {
            let dir = tempfile::tempdir().unwrap();
            let store = Store::new(dir.path());
            let t = Instant::now();
            let o = hadal::pipeline::execute(&model, Some(&store)).expect("runs");
            let c = t.elapsed();
            cold.push(c);
            let stage_total: Duration = o.run.stages.iter().map(|s| s.wall).sum();
            let last = o.run.stages.last().map(|s| s.wall).unwrap_or_default();
            last_share.push(last.as_secs_f64() / stage_total.as_secs_f64().max(1e-12));
            let t = Instant::now();
            black_box(hadal::pipeline::execute(&model, Some(&store)).expect("runs"));
            warm.push(t.elapsed());
            if let Some(m) = &edited {
                let t = Instant::now();
                let o = hadal::pipeline::execute(m, Some(&store)).expect("runs");
                edit.push(t.elapsed());
                assert_eq!(o.stages.last().map(|s| s.status.word()), Some("computed"));
                assert!(o.stages[..o.stages.len() - 1]
                    .iter()
                    .all(|s| s.status.word() == "reused"));
            }
        }
        let (c, w) = (median(cold), median(warm));
        last_share.sort_by(f64::total_cmp);
        let share = last_share[last_share.len() / 2];
        println!("  {name}:");
        println!(
            "    cold run                 {:>9.3} ms",
            c.as_secs_f64() * 1e3
        );
        println!(
            "    unchanged rerun          {:>9.3} ms  = {:.1} % of cold (target <= 10 %)",
            w.as_secs_f64() * 1e3,
            100.0 * w.as_secs_f64() / c.as_secs_f64()
        );
        if !edit.is_empty() {
            let e = median(edit);
            println!(
                "    last-stage edit          {:>9.3} ms  = {:.1} % of cold; the last stage is {:.1} % of the solve (target <= share + 10 %)",
                e.as_secs_f64() * 1e3,
                100.0 * e.as_secs_f64() / c.as_secs_f64(),
                100.0 * share
            );
        }
    }
}
