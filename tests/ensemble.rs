//! Ensembles through the real binary: determinism across threads and
//! shards, and recovery of an accepted region known in closed form.

use std::path::{Path, PathBuf};
use std::process::Command;

fn hadal(dir: &Path, args: &[&str]) -> std::process::Output {
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(dir)
        .args(args)
        .env("HADAL_CACHE", dir.join(".cache"))
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    assert!(
        o.status.success(),
        "{args:?}: {}",
        String::from_utf8_lossy(&o.stderr)
    );
    o
}

const STUDY: &str = "\
scenario study \"a two-box study\"
span 2 Ga to 0 Ga
report every 100 Myr
param k = 0.5 / 1 Gyr
param late_k = 0.1 / 1 Gyr
reservoir a = 1e21 kg
reservoir b = 1e20 kg
flux ab: a -> b = k * a
output share = b / (a + b) in %
stage one from 2 Ga to 1 Ga
stage two from 1 Ga to 0 Ga {
  flux back: b -> a = late_k * b
}
event half = b > a
expect b at 0 Ga = 5e20 kg +- 1e20 kg
expect half before 0.5 Ga
ensemble {
  members = 90
  seed = 3
  vary k ~ log_uniform(0.1 / 1 Gyr, 2 / 1 Gyr)
  vary late_k ~ normal(0.1 / 1 Gyr, 0.05 / 1 Gyr), min = 0 / 1 Gyr
}
";

fn outputs(dir: &Path) -> Vec<(String, Vec<u8>)> {
    [
        "members.csv",
        "quantiles.csv",
        "summary.json",
        "ensemble.state",
    ]
    .iter()
    .map(|n| {
        (
            n.to_string(),
            std::fs::read(dir.join(n)).unwrap_or_else(|_| panic!("{n} in {}", dir.display())),
        )
    })
    .collect()
}

/// The unsharded runs (90 members) run native code where the machine has
/// it, the shards of 30 the interpreter (native code is built from 50
/// members): their merged bytes must agree all the same.
#[test]
fn same_seed_same_bytes_for_any_thread_count_and_shard_split() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    std::fs::write(d.join("s.hadal"), STUDY).unwrap();
    hadal(
        d,
        &[
            "ensemble",
            "s.hadal",
            "--threads",
            "1",
            "--out",
            "one",
            "--no-cache",
        ],
    );
    hadal(
        d,
        &["ensemble", "s.hadal", "--threads", "2", "--out", "two"],
    );
    let mut shards: Vec<PathBuf> = Vec::new();
    for k in 1..=3 {
        let out = format!("shard{k}");
        hadal(
            d,
            &[
                "ensemble",
                "s.hadal",
                "--shard",
                &format!("{k}/3"),
                "--out",
                &out,
            ],
        );
        shards.push(d.join(out));
    }
    let mut args: Vec<String> = vec!["merge".into()];
    args.extend(
        shards
            .iter()
            .rev()
            .map(|p| p.to_string_lossy().into_owned()),
    );
    args.push("--out".into());
    args.push("merged".into());
    let refs: Vec<&str> = args.iter().map(String::as_str).collect();
    hadal(d, &refs);
    let one = outputs(&d.join("one"));
    assert_eq!(one, outputs(&d.join("two")), "1 thread against 2");
    assert_eq!(
        one,
        outputs(&d.join("merged")),
        "unsharded against 3 shards merged"
    );
    // The members file has one row per member, in member order.
    let members = String::from_utf8(one[0].1.clone()).unwrap();
    let ids: Vec<u64> = members
        .lines()
        .skip(1)
        .map(|l| l.split(',').next().unwrap().parse().unwrap())
        .collect();
    assert_eq!(ids, (0..90).collect::<Vec<_>>());
    // A different seed gives different members.
    hadal(d, &["ensemble", "s.hadal", "--seed", "4", "--out", "other"]);
    assert_ne!(
        one[0].1,
        std::fs::read(d.join("other/members.csv")).unwrap()
    );
}

#[test]
fn merge_refuses_incomplete_or_mismatched_shards() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    std::fs::write(d.join("s.hadal"), STUDY).unwrap();
    hadal(d, &["ensemble", "s.hadal", "--shard", "1/3", "--out", "a"]);
    hadal(d, &["ensemble", "s.hadal", "--shard", "3/3", "--out", "c"]);
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(d)
        .args(["merge", "a", "c", "--out", "m"])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(1));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("missing"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
}

#[test]
fn the_accepted_region_of_a_linear_exchange_matches_its_closed_form() {
    // One-way exchange a -> b at rate k over 1 Gyr: b(T) = b0 + a0 (1 - exp(-k T)).
    // The target b(T) in [lo, hi] accepts exactly k in [-ln(1 - (lo - b0)/a0) / T,
    // -ln(1 - (hi - b0)/a0) / T].
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    let text = "\
scenario linear \"one-way exchange\"
span 1 Ga to 0 Ga
report every 100 Myr
param k = 1 / 1 Gyr
reservoir a = 1e21 kg
reservoir b = 0 kg
flux ab: a -> b = k * a
stage all from 1 Ga to 0 Ga
expect b at 0 Ga in 4e20 kg to 6e20 kg
ensemble {
  vary k ~ grid(0.1 / 1 Gyr, 2 / 1 Gyr, 191)
}
";
    std::fs::write(d.join("s.hadal"), text).unwrap();
    hadal(d, &["ensemble", "s.hadal", "--out", "e"]);
    let (a0, lo, hi, big_t) = (1e21f64, 4e20f64, 6e20f64, 1e9f64);
    let k_lo = -(1.0 - lo / a0).ln() / big_t;
    let k_hi = -(1.0 - hi / a0).ln() / big_t;
    let members = std::fs::read_to_string(d.join("e/members.csv")).unwrap();
    let mut accepted = 0;
    for line in members.lines().skip(1) {
        let cells: Vec<&str> = line.split(',').collect();
        let k: f64 = cells[1].parse().unwrap();
        let expected = k >= k_lo && k <= k_hi;
        // Members within 1e-6 of the boundary could go either way.
        if (k - k_lo).abs() / k_lo < 1e-6 || (k - k_hi).abs() / k_hi < 1e-6 {
            continue;
        }
        assert_eq!(cells[cells.len() - 2] == "yes", expected, "k = {k}");
        accepted += expected as usize;
    }
    // The grid step is 0.01 per Gyr; [0.511, 0.916] per Gyr holds 0.52 to 0.91: 40 points.
    assert_eq!(accepted, 40);
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(d.join("e/summary.json")).unwrap()).unwrap();
    let acc = &summary["parameters"][0]["accepted"];
    assert!(
        (acc["min"].as_f64().unwrap() - 0.52e-9).abs() < 1e-15,
        "{acc}"
    );
    assert!(
        (acc["max"].as_f64().unwrap() - 0.91e-9).abs() < 1e-15,
        "{acc}"
    );
    assert_eq!(summary["members"], 191);
}

#[test]
fn only_late_parameters_vary_so_early_stages_are_shared() {
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("s.hadal");
    std::fs::write(
        &p,
        STUDY.replace("  vary k ~ log_uniform(0.1 / 1 Gyr, 2 / 1 Gyr)\n", ""),
    )
    .unwrap();
    let m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    assert_eq!(hadal::ensemble::first_varying_stage(&m), 1);
    std::fs::write(&p, STUDY).unwrap();
    let m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    assert_eq!(hadal::ensemble::first_varying_stage(&m), 0);
}

#[test]
fn member_values_depend_only_on_seed_member_and_name() {
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("s.hadal");
    std::fs::write(&p, STUDY).unwrap();
    let m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    let a = hadal::ensemble::member_values(&m, 3, 17).unwrap();
    // Reordering the vary lines keeps each parameter's draw.
    let swapped = STUDY.replace(
        "  vary k ~ log_uniform(0.1 / 1 Gyr, 2 / 1 Gyr)\n  vary late_k ~ normal(0.1 / 1 Gyr, 0.05 / 1 Gyr), min = 0 / 1 Gyr\n",
        "  vary late_k ~ normal(0.1 / 1 Gyr, 0.05 / 1 Gyr), min = 0 / 1 Gyr\n  vary k ~ log_uniform(0.1 / 1 Gyr, 2 / 1 Gyr)\n",
    );
    std::fs::write(&p, swapped).unwrap();
    let m2 = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    let b = hadal::ensemble::member_values(&m2, 3, 17).unwrap();
    assert_eq!(a[0].to_bits(), b[1].to_bits());
    assert_eq!(a[1].to_bits(), b[0].to_bits());
    // log-uniform within its bounds, truncated normal above its minimum.
    for i in 0..500 {
        let v = hadal::ensemble::member_values(&m, 3, i).unwrap();
        assert!((1e-10..=2e-9).contains(&v[0]), "{v:?}");
        assert!(v[1] >= 0.0, "{v:?}");
    }
}

/// A scenario whose one varied parameter is `q0`, with the `vary` line given.
fn heat_study(vary: &str) -> String {
    format!(
        "\
scenario heat \"a truncated heat flow\"
span 1 Ga to 0 Ga
report every 100 Myr
param q0 = 24 TW
reservoir a = 1e21 kg
reservoir b = 1e20 kg
flux ab: a -> b = a * q0 / 1e14 TW / 1 Gyr
stage all from 1 Ga to 0 Ga
ensemble {{
  members = 20
  {vary}
}}
"
    )
}

#[test]
fn a_truncation_that_leaves_nothing_is_refused_before_any_member_runs() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    std::fs::write(
        d.join("s.hadal"),
        heat_study("vary q0 ~ normal(24 TW, 1 TW), min = 64 TW"),
    )
    .unwrap();
    let o = Command::new(env!("CARGO_BIN_EXE_hadal"))
        .current_dir(d)
        .args(["ensemble", "s.hadal", "--out", "out"])
        .env("HADAL_CACHE", d.join(".cache"))
        .env("NO_COLOR", "1")
        .output()
        .unwrap();
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(err.contains("H0414"), "{err}");
    assert!(!d.join("out/members.csv").exists());
}

#[test]
fn thin_truncations_are_drawn_inside_their_bounds_never_as_nan() {
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    // 6 standard deviations up keeps about 1e-9 of the normal: rejection
    // would never get there, the inverse distribution function does.
    std::fs::write(
        d.join("s.hadal"),
        heat_study("vary q0 ~ normal(24 TW, 1 TW), min = 30 TW"),
    )
    .unwrap();
    hadal(d, &["ensemble", "s.hadal", "--out", "out"]);
    let csv = std::fs::read_to_string(d.join("out/members.csv")).unwrap();
    let rows: Vec<&str> = csv.lines().skip(1).collect();
    assert_eq!(rows.len(), 20, "{csv}");
    for row in rows {
        let cells: Vec<&str> = row.split(',').collect();
        let q0: f64 = cells[1].parse().unwrap_or(f64::NAN);
        assert!((30.0..40.0).contains(&q0), "{row}");
        assert_eq!(cells.last(), Some(&"ok"), "{row}");
    }

    // The mean of a standard normal beyond a is phi(a) / Q(a), the inverse
    // Mills ratio: 6.0758828e-9 / 9.8658765e-10 = 6.1584826 at a = 6, with
    // a standard deviation of sqrt(1 + a m - m^2) = 0.155 (Johnson, Kotz &
    // Balakrishnan, Continuous Univariate Distributions, vol. 1, ch. 13).
    let p = d.join("k.hadal");
    std::fs::write(
        &p,
        "scenario k\nspan 1 Ga to 0 Ga\nreport every 1 Gyr\nparam k = 0\nstage all from 1 Ga to 0 Ga\n\
         ensemble {\n  vary k ~ normal(0, 1), min = 6\n}\n",
    )
    .unwrap();
    let m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    let n = 4000;
    let mut sum = 0.0;
    for i in 0..n {
        let v = hadal::ensemble::member_values(&m, 11, i).unwrap()[0];
        assert!(v >= 6.0 && v.is_finite(), "member {i}: {v}");
        sum += v;
    }
    let mean = sum / n as f64;
    // Four standard errors: 4 * 0.155 / sqrt(4000) = 0.0098.
    assert!((mean - 6.158_482_6).abs() < 0.01, "mean {mean}");
}

#[test]
fn truncated_shares_and_inverses_of_every_random_distribution() {
    use hadal::model::Dist;
    let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * b.abs().max(1e-300);
    // Uniform: the share of the range, and the point at a share of it.
    let u = Dist::Uniform(0.0, 10.0);
    assert!(close(u.mass_between(Some(2.0), Some(3.0)), 0.1));
    assert!(close(
        u.truncated_at(Some(2.0), Some(3.0), 0.5).unwrap(),
        2.5
    ));
    assert_eq!(u.mass_between(Some(11.0), None), 0.0);
    // Log-uniform: shares of the logarithm; 1..100 cut at 10 keeps half,
    // and a bound at or below zero cuts nothing.
    let lu = Dist::LogUniform(1.0, 100.0);
    assert!(close(lu.mass_between(None, Some(10.0)), 0.5));
    assert!(close(
        lu.truncated_at(None, Some(10.0), 0.5).unwrap(),
        10f64.sqrt()
    ));
    assert_eq!(lu.mass_between(Some(-1.0), None), 1.0);
    // Normal: P(Z > 2) = 0.0227501 (standard normal tables).
    let n = Dist::Normal {
        mean: 24.0,
        sd: 1.0,
    };
    assert!((n.mass_between(Some(26.0), None) - 0.022_750_1).abs() < 1e-7);
    let x = n.truncated_at(Some(26.0), None, 0.5).unwrap();
    assert!((n.mass_between(Some(x), None) / 0.022_750_1 - 0.5).abs() < 1e-6);
    // Log-normal: ln x is normal, so the share above median * e^(2 sd_ln)
    // is the same 0.0227501; a bound at or below zero cuts nothing.
    let ln = Dist::LogNormal {
        median: 3.0,
        sd_ln: 0.5,
    };
    assert!((ln.mass_between(Some(3.0 * 1f64.exp()), None) - 0.022_750_1).abs() < 1e-7);
    assert_eq!(ln.mass_between(Some(0.0), None), 1.0);
    // Design axes are not truncated.
    assert_eq!(
        Dist::List(vec![1.0, 2.0]).mass_between(Some(5.0), None),
        1.0
    );
    assert_eq!(Dist::List(vec![1.0]).truncated_at(None, None, 0.5), None);
}

#[test]
fn a_member_whose_parameter_is_not_finite_stops_the_run_without_a_members_file() {
    // The checker refuses distributions that could overflow (H0411); a
    // model built in code can still hold one, and the sampler's guard
    // must refuse it rather than write `inf` into members.csv.
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("s.hadal");
    std::fs::write(&p, heat_study("vary q0 ~ uniform(20 TW, 30 TW)")).unwrap();
    let mut m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    m.ensemble.as_mut().unwrap().vary[0].dist = hadal::model::Dist::Uniform(-1e308, 1e308);
    let opts = hadal::ensemble::Options {
        members: Some(4),
        seed: None,
        shard: (1, 1),
        threads: Some(1),
        keep_series: false,
        store: None,
        progress: None,
    };
    let out = t.path().join("out");
    let err =
        hadal::ensemble::run(&m, &opts, &mut hadal::ensemble::FileSink::new(&out)).unwrap_err();
    // Typed: the member and the parameter are named, the words as before.
    assert!(
        matches!(&err, hadal::ensemble::EnsembleError::In { context, error }
            if context == "member 0"
                && matches!(**error, hadal::ensemble::EnsembleError::NotFinite { .. })),
        "{err:?}"
    );
    let err = err.to_string();
    assert!(err.contains("not a finite number"), "{err}");
    assert!(!out.join("members.csv").exists());
    let left: Vec<_> = std::fs::read_dir(&out).unwrap().collect();
    assert!(left.is_empty(), "{left:?}");
}

#[test]
fn a_file_without_an_ensemble_block_is_held_to_the_ensemble_memory_budget() {
    // Its check counts a single run (a million rows of a small model fit);
    // as an ensemble the quantile sketches do not, and before this was
    // checked the run took more than 2 GiB for four members.
    let t = tempfile::tempdir().unwrap();
    let d = t.path();
    std::fs::write(
        d.join("s.hadal"),
        "scenario fine \"a fine cadence\"\nspan 1 Ga to 0 Ga\nreport every 1 kyr\n\
         reservoir a = 1e21 kg\nreservoir b = 1e20 kg\nflux ab: a -> b = 0.5 / 1 Gyr * a\n\
         stage all from 1 Ga to 0 Ga\n",
    )
    .unwrap();
    let run = |verb: &[&str]| {
        Command::new(env!("CARGO_BIN_EXE_hadal"))
            .current_dir(d)
            .args(verb)
            .env("NO_COLOR", "1")
            .output()
            .unwrap()
    };
    let checked = run(&["check", "s.hadal"]);
    assert!(checked.status.success(), "{:?}", checked);
    let o = run(&[
        "ensemble",
        "s.hadal",
        "--members",
        "4",
        "--no-cache",
        "--out",
        "out",
    ]);
    let err = String::from_utf8_lossy(&o.stderr);
    assert_eq!(o.status.code(), Some(1), "{err}");
    assert!(err.contains("H0412") && err.contains("coarser"), "{err}");
    assert!(!d.join("out/members.csv").exists());
}

#[test]
fn ensemble_progress_is_reported_through_the_callback_from_none_to_all_members() {
    // The library draws no bar: it tells the caller, after each chunk, how
    // many members are done out of how many.
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("s.hadal");
    std::fs::write(&p, heat_study("vary q0 ~ uniform(20 TW, 30 TW)")).unwrap();
    let m = hadal::check::check_file(&p, &Default::default())
        .unwrap()
        .model;
    let seen = std::sync::Arc::new(std::sync::Mutex::new(Vec::new()));
    let log = std::sync::Arc::clone(&seen);
    let opts = hadal::ensemble::Options {
        members: Some(6),
        seed: None,
        shard: (1, 1),
        threads: Some(2),
        keep_series: false,
        store: None,
        progress: Some(hadal::ensemble::Progress(std::sync::Arc::new(
            move |done, total| log.lock().unwrap().push((done, total)),
        ))),
    };
    hadal::ensemble::run(&m, &opts, &mut hadal::ensemble::MemorySink::default()).unwrap();
    let seen = seen.lock().unwrap().clone();
    assert_eq!(seen.first(), Some(&(0, 6)), "{seen:?}");
    assert_eq!(seen.last(), Some(&(6, 6)), "{seen:?}");
    assert!(seen.windows(2).all(|w| w[0].0 <= w[1].0), "{seen:?}");
}

#[test]
fn the_library_returns_members_as_numbers_and_writes_the_files_of_the_command_line() {
    // The command line streams members.csv through the file sink; a library
    // caller can keep the members in memory and write the summaries as a
    // separate step: the same numbers and the same summary bytes.
    let t = tempfile::tempdir().unwrap();
    std::fs::write(t.path().join("s.hadal"), STUDY).unwrap();
    hadal(
        t.path(),
        &[
            "ensemble",
            "s.hadal",
            "--no-cache",
            "--out",
            "cli",
            "--no-plots",
        ],
    );
    let cli = outputs(&t.path().join("cli"));

    let scenario = hadal::api::load(&t.path().join("s.hadal"), &Default::default()).unwrap();
    let opts = hadal::ensemble::Options {
        members: None,
        seed: None,
        shard: (1, 1),
        threads: Some(2),
        keep_series: false,
        store: None,
        progress: None,
    };
    let lib_dir = t.path().join("lib");
    let ran = scenario
        .ensemble(&opts, &mut hadal::ensemble::FileSink::new(&lib_dir))
        .unwrap();
    ran.write(&lib_dir).unwrap();
    assert!(
        outputs(&lib_dir) == cli,
        "library files differ from the CLI's"
    );

    let mut mem = hadal::ensemble::MemorySink::default();
    let ran = scenario.ensemble(&opts, &mut mem).unwrap();
    let mem_dir = t.path().join("mem");
    std::fs::create_dir_all(&mem_dir).unwrap();
    ran.write(&mem_dir).unwrap();
    for n in ["quantiles.csv", "summary.json", "ensemble.state"] {
        assert!(
            std::fs::read(mem_dir.join(n)).unwrap() == std::fs::read(lib_dir.join(n)).unwrap(),
            "{n}"
        );
    }
    assert!(!mem_dir.join("members.csv").exists());

    let text = String::from_utf8(cli[0].1.clone()).unwrap();
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(mem.columns, header);
    assert_eq!(mem.len(), 90);
    for (i, line) in lines.enumerate() {
        let cells: Vec<&str> = line.split(',').collect();
        let row = mem.row(i);
        let (status, numbers) = cells.split_last().unwrap();
        assert_eq!(&mem.status[i], status, "member {i}");
        assert_eq!(row.len(), numbers.len());
        assert_eq!(numbers[0].parse::<f64>().unwrap(), row[0]);
        for (c, (cell, v)) in numbers.iter().zip(row).enumerate().skip(1) {
            let want = match *cell {
                "yes" => "1".to_owned(),
                "no" => "0".to_owned(),
                _ => hadal::report::fmt_num(*v),
            };
            let got = match *cell {
                "yes" | "no" => hadal::report::fmt_num(*v),
                _ => cell.to_string(),
            };
            assert_eq!(got, want, "member {i}, column {}", header[c]);
        }
    }
    assert_eq!(ran.state.accepted, {
        let acc = header.iter().position(|h| *h == "accepted").unwrap();
        (0..mem.len()).filter(|&i| mem.row(i)[acc] == 1.0).count() as u64
    });
}

#[test]
fn kept_series_reach_either_sink_with_the_same_bytes() {
    // `--keep-series` writes series/member_NNNNNNN.csv through the file
    // sink; the memory sink holds the same text under the member's number.
    let t = tempfile::tempdir().unwrap();
    let p = t.path().join("s.hadal");
    std::fs::write(&p, heat_study("vary q0 ~ uniform(20 TW, 30 TW)")).unwrap();
    let scenario = hadal::api::load(&p, &Default::default()).unwrap();
    let opts = hadal::ensemble::Options {
        members: Some(5),
        seed: None,
        shard: (2, 2),
        threads: Some(2),
        keep_series: true,
        store: None,
        progress: None,
    };
    let dir = t.path().join("out");
    scenario
        .ensemble(&opts, &mut hadal::ensemble::FileSink::new(&dir))
        .unwrap();
    let mut mem = hadal::ensemble::MemorySink::default();
    scenario.ensemble(&opts, &mut mem).unwrap();
    // Shard 2 of 2 of five members: members 2, 3 and 4.
    assert_eq!(
        mem.series.iter().map(|s| s.0).collect::<Vec<_>>(),
        [2, 3, 4]
    );
    let mut files: Vec<_> = std::fs::read_dir(dir.join("series"))
        .unwrap()
        .map(|e| e.unwrap().file_name().into_string().unwrap())
        .collect();
    files.sort();
    assert_eq!(
        files,
        [
            "member_0000002.csv",
            "member_0000003.csv",
            "member_0000004.csv"
        ]
    );
    for (i, csv) in &mem.series {
        let on_disk = std::fs::read(dir.join(format!("series/member_{i:07}.csv"))).unwrap();
        assert!(on_disk == *csv, "member {i}");
        assert!(csv.starts_with(b"age"), "member {i}");
    }
    assert_eq!(mem.row(0)[0], 2.0);
}
