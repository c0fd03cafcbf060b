//! Declaration order and formatting never change a result.
//!
//! Every demo scenario (and the files it includes) is rewritten with its
//! top-level declarations in a random order (stages keep their time order)
//! and random formatting: CRLF line ends, a byte-order mark, extra comments
//! and blank lines. Run through the real binary against one shared stage
//! cache, every variant must reuse every stage of the original run and write
//! a byte-identical series, and solved afresh without the cache, give the
//! same bytes again. Before fluxes were summed in the order of their
//! names, swapping two `flux` lines moved the last bits of the series while
//! the stage fingerprint stayed the same, so the cache handed one order's
//! stages to the other.

use std::path::{Path, PathBuf};
use std::process::Command;

use proptest::prelude::*;
use proptest::test_runner::{Config, TestRunner};

/// The library's SplitMix64 for the shuffles, so a failing seed replays.
struct Mix(hadal::ensemble::SplitMix);

impl Mix {
    fn next(&mut self) -> u64 {
        self.0.next()
    }
    /// A whole number below `n`.
    fn below(&mut self, n: usize) -> usize {
        (self.next() % n as u64) as usize
    }
    fn chance(&mut self, p: f64) -> bool {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64 <= p
    }
}

/// One top-level statement with the comment lines above it, as text.
struct Chunk {
    text: String,
    is_stage: bool,
}

/// Cut a scenario into chunks (comments above a statement stay with it) and
/// what follows the last statement.
fn chunks(text: &str) -> (Vec<Chunk>, String) {
    let file = hadal::syntax::parse(text, 0).expect("demo scenarios parse");
    let line_starts: Vec<usize> = std::iter::once(0)
        .chain(text.match_indices('\n').map(|(i, _)| i + 1))
        .collect();
    let line_of = |byte: usize| line_starts.partition_point(|&s| s <= byte) - 1;
    let mut out = Vec::new();
    let mut from = 0usize;
    for e in &file.entries {
        let hadal::syntax::EntryKind::Stmt(stmt) = &e.kind else {
            continue;
        };
        let last_line = line_of(stmt.span.end as usize - 1);
        let end = line_starts
            .get(last_line + 1)
            .copied()
            .unwrap_or(text.len());
        out.push(Chunk {
            text: text[from..end].trim_end_matches(['\n', '\r']).to_owned(),
            is_stage: matches!(stmt.kind, hadal::syntax::StmtKind::Stage { .. }),
        });
        from = end;
    }
    (out, text[from..].to_owned())
}

/// The chunks in a random order that keeps the stages' relative order, with
/// random formatting between and around them.
fn shuffled(text: &str, rng: &mut Mix) -> String {
    let (chunks, tail) = chunks(text);
    let mut order: Vec<usize> = (0..chunks.len()).collect();
    for i in (1..order.len()).rev() {
        order.swap(i, rng.below(i + 1));
    }
    // Put the stages back into their slots in their original order.
    let stage_slots: Vec<usize> = (0..order.len())
        .filter(|&k| chunks[order[k]].is_stage)
        .collect();
    let stages: Vec<usize> = (0..chunks.len()).filter(|&i| chunks[i].is_stage).collect();
    for (slot, stage) in stage_slots.into_iter().zip(stages) {
        order[slot] = stage;
    }
    let newline = if rng.chance(0.5) { "\r\n" } else { "\n" };
    let mut out = String::new();
    if rng.chance(0.5) {
        out.push('\u{feff}');
    }
    for i in order {
        for _ in 0..rng.below(3) {
            out.push_str(newline);
        }
        if rng.chance(0.3) {
            out.push_str("# a comment the reorder test added");
            out.push_str(newline);
        }
        out.push_str(&chunks[i].text.replace('\n', newline).replace("\r\r", "\r"));
        if rng.chance(0.2) {
            out.push_str("   # trailing");
        }
        out.push_str(newline);
    }
    out.push_str(&tail.replace('\n', newline).replace("\r\r", "\r"));
    out
}

fn copy_tree(from: &Path, to: &Path) {
    std::fs::create_dir_all(to).unwrap();
    for e in std::fs::read_dir(from).unwrap() {
        let e = e.unwrap();
        let target = to.join(e.file_name());
        if e.file_type().unwrap().is_dir() {
            copy_tree(&e.path(), &target);
        } else {
            std::fs::copy(e.path(), &target).unwrap();
        }
    }
}

/// Every `.hadal` file under `dir`.
fn scenario_files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            out.extend(scenario_files(&p));
        } else if p.extension().is_some_and(|x| x == "hadal") {
            out.push(p);
        }
    }
    out.sort();
    out
}

/// Run `scenario` with the shared cache (or none); (stage statuses, series
/// bytes).
fn run(scenario: &Path, out: &Path, cache: Option<&Path>) -> (Vec<String>, Vec<u8>) {
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_hadal"));
    cmd.arg("run")
        .arg(scenario)
        .arg("--out")
        .arg(out)
        .arg("--json")
        .env("NO_COLOR", "1");
    match cache {
        Some(c) => cmd.env("HADAL_CACHE", c),
        None => cmd.arg("--no-cache"),
    };
    let o = cmd.output().unwrap();
    assert!(
        o.status.success(),
        "{}: {}",
        scenario.display(),
        String::from_utf8_lossy(&o.stderr)
    );
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    let statuses = v["stages"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s["status"].as_str().unwrap().to_owned())
        .collect();
    (statuses, std::fs::read(out.join("series.csv")).unwrap())
}

#[test]
fn reordered_and_reformatted_demos_reuse_every_stage_and_give_the_same_bytes() {
    let demos = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios");
    let work = tempfile::tempdir().unwrap();
    std::fs::create_dir(work.path().join(".git")).unwrap();
    let original = work.path().join("original");
    copy_tree(&demos, &original);
    let cache = work.path().join("cache");
    let tops: Vec<PathBuf> = std::fs::read_dir(&original)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|x| x == "hadal"))
        .collect();
    assert!(tops.len() >= 2, "the demos are there");
    let baselines: Vec<(Vec<String>, Vec<u8>)> = tops
        .iter()
        .map(|t| run(t, &work.path().join("out-original"), Some(&cache)))
        .collect();

    let mut runner = TestRunner::new(Config {
        cases: 8,
        failure_persistence: None,
        ..Config::default()
    });
    let variant = std::cell::Cell::new(0usize);
    runner
        .run(&any::<u64>(), |seed| {
            variant.set(variant.get() + 1);
            let mut rng = Mix(hadal::ensemble::SplitMix(seed));
            let dir = work.path().join(format!("variant-{}", variant.get()));
            copy_tree(&original, &dir);
            for f in scenario_files(&dir) {
                let text = std::fs::read_to_string(&f).unwrap();
                std::fs::write(&f, shuffled(&text, &mut rng)).unwrap();
            }
            for (top, (base_status, base_series)) in tops.iter().zip(&baselines) {
                let file = dir.join(top.file_name().unwrap());
                let (status, series) = run(&file, &dir.join("out"), Some(&cache));
                // What the cache handed out must be what a fresh solve of
                // this very text gives.
                let (_, fresh) = run(&file, &dir.join("fresh"), None);
                prop_assert!(
                    &fresh == base_series,
                    "{} (seed {}): solved afresh, the variant differs from the original",
                    file.display(),
                    seed
                );
                prop_assert_eq!(
                    &status,
                    &vec!["reused".to_owned(); base_status.len()],
                    "{} (seed {}): every stage is reused",
                    file.display(),
                    seed
                );
                prop_assert!(
                    &series == base_series,
                    "{} (seed {}): the series differs from the original's",
                    file.display(),
                    seed
                );
            }
            Ok(())
        })
        .unwrap();
}

#[test]
fn swapping_two_flux_lines_changes_no_bit_even_without_the_cache() {
    // The arithmetic itself, apart from the cache: both orders solved from
    // scratch give the same series.
    let text_a = "\
scenario swap \"flux order\"
span 2 Ga to 0 Ga
report every 50 Myr
reservoir a = 1e21 kg
reservoir b = 3e20 kg
reservoir c = 7e19 kg
flux ab: a -> b = 0.7 / 1 Gyr * a
flux ba: b -> a = 0.3 / 1 Gyr * b
flux bc: b -> c = 1.1 / 1 Gyr * b
flux ca: c -> a = 0.9 / 1 Gyr * c
stage all from 2 Ga to 0 Ga
";
    let lines: Vec<&str> = text_a.lines().collect();
    let mut b_lines = lines.clone();
    // Reverse the four flux lines.
    b_lines[6..10].reverse();
    let text_b = b_lines.join("\n") + "\n";
    assert_ne!(text_a, text_b);
    let dir = tempfile::tempdir().unwrap();
    std::fs::create_dir(dir.path().join(".git")).unwrap();
    let (pa, pb) = (dir.path().join("a.hadal"), dir.path().join("b.hadal"));
    std::fs::write(&pa, text_a).unwrap();
    std::fs::write(&pb, &text_b).unwrap();
    let series = |p: &Path, out: &str| {
        let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
            .args(["run", "--no-cache", "--out"])
            .arg(dir.path().join(out))
            .arg(p)
            .env("NO_COLOR", "1")
            .output()
            .unwrap();
        assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
        std::fs::read(dir.path().join(out).join("series.csv")).unwrap()
    };
    assert!(series(&pa, "a") == series(&pb, "b"));
}
