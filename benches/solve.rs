//! Solver benchmarks: the demo scenario compiled by hadal against the same
//! equations written by hand in Rust, run by the same integrator, in one
//! process so the ratio holds on a noisy machine.
//!
//!     cargo bench --bench solve
//!
//! Prints medians over repeated runs and the ratios the README reports.

#[path = "hand_coded/mod.rs"]
mod hand_coded;
#[path = "timing.rs"]
mod timing;

use std::hint::black_box;
use std::path::Path;
use std::time::{Duration, Instant};

use timing::median;

use hadal::compile::{self, Wants};
use hadal::solve::methods::{self, Dense, Observer, Stats, Stop};
use hadal::solve::{self, State};

struct NoRows;
impl Observer for NoRows {
    fn accepted(&mut self, _: f64, _: f64, _: &[f64], _: &Dense) -> Result<(), Stop> {
        Ok(())
    }
}

/// Medians of `f` and of `g` sampled in turn, and the median of the ratios
/// of neighbouring samples.
fn median_pair(
    budget: Duration,
    mut f: impl FnMut(),
    mut g: impl FnMut(),
) -> (Duration, Duration, f64) {
    for _ in 0..3 {
        f();
        g();
    }
    let (mut a, mut b, mut r) = (Vec::new(), Vec::new(), Vec::new());
    let start = Instant::now();
    while a.len() < 15 || (start.elapsed() < budget && a.len() < 2000) {
        let t = Instant::now();
        f();
        let x = t.elapsed();
        let t = Instant::now();
        g();
        let y = t.elapsed();
        a.push(x);
        b.push(y);
        r.push(x.as_secs_f64() / y.as_secs_f64().max(1e-12));
    }
    a.sort();
    b.sort();
    r.sort_by(f64::total_cmp);
    (a[a.len() / 2], b[b.len() / 2], r[r.len() / 2])
}

fn ms(d: Duration) -> String {
    format!("{:.3} ms", d.as_secs_f64() * 1e3)
}

fn main() {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("scenarios/hot_start.hadal");
    let model = hadal::check::check_file(&path, &Default::default())
        .expect("the demo checks")
        .model;
    let budget = Duration::from_secs(3);

    // 1. The compiled scenario, integration only: programs built once, the
    //    same integrator and settings as the hand-coded function, no rows.
    let programs: Vec<compile::Program> = (0..model.stages.len())
        .map(|s| {
            compile::compile(
                &model,
                Some(s),
                &Wants {
                    rhs: true,
                    ..Default::default()
                },
            )
        })
        .collect();
    // The same programs as native code (what ensembles run).
    let native: Vec<compile::Program> = programs
        .iter()
        .map(|p| {
            let mut p = p.clone();
            p.make_native();
            p
        })
        .collect();
    let integrate = |programs: &[compile::Program]| {
        let mut y = solve::initial_state(&model).0;
        for (s, prog) in programs.iter().enumerate() {
            let st = &model.stages[s];
            let mut ctl = solve::stage_control(&model, s, &State(y.clone()));
            let mut sys = solve::Sys::new(&model, prog);
            let mut stats = Stats::default();
            methods::integrate(
                &mut sys,
                model.start_age - st.start_age,
                model.start_age - st.end_age,
                &mut y,
                &mut ctl,
                &mut NoRows,
                &mut stats,
            )
            .expect("integrates");
        }
        black_box(y);
    };
    let integrate_compiled = || integrate(&programs);
    // Interleaved, one of each in turn, so that a change of the machine's
    // speed during the run (these machines are shared) falls on both sides
    // of the ratio alike.
    let (compiled, hand, pair_ratio) = median_pair(budget * 2, integrate_compiled, || {
        black_box(hand_coded::run_hand_coded());
    });
    let (native_time, hand_n, native_pair) = median_pair(
        budget * 2,
        || integrate(&native),
        || {
            black_box(hand_coded::run_hand_coded());
        },
    );
    let build_native = median(Duration::from_millis(500), || {
        for p in &programs {
            let mut p = p.clone();
            black_box(p.make_native());
        }
    });
    // 2. The full solve as `hadal run` does it: compile every stage, watch
    //    events, produce the 451 report rows.
    let full = median(budget, || {
        black_box(hadal::pipeline::solve_all(&model).expect("solves"));
    });
    // 3. Parse and check of the scenario and its includes.
    let check = median(budget, || {
        black_box(hadal::check::check_file(&path, &Default::default()).ok());
    });
    // 4. One right-hand-side evaluation.
    let prog = &programs[1];
    let y0 = solve::initial_state(&model).0;
    let mut sys = solve::Sys::new(&model, prog);
    let mut dy = vec![0.0; y0.len()];
    let rhs = median(Duration::from_millis(500), || {
        for _ in 0..1000 {
            methods::System::rhs(&mut sys, black_box(1e9), black_box(&y0), &mut dy);
        }
        black_box(&dy);
    }) / 1000;
    let mut nsys = solve::Sys::new(&model, &native[1]);
    let nrhs = median(Duration::from_millis(500), || {
        for _ in 0..1000 {
            methods::System::rhs(&mut nsys, black_box(1e9), black_box(&y0), &mut dy);
        }
        black_box(&dy);
    }) / 1000;
    let mut hsys = hand_coded::HandCoded::new(1);
    let hrhs = median(Duration::from_millis(500), || {
        for _ in 0..1000 {
            methods::System::rhs(&mut hsys, black_box(1e9), black_box(&y0), &mut dy);
        }
        black_box(&dy);
    }) / 1000;

    println!("hot_start demo (3 stages, 4.5 Gyr), medians:");
    println!(
        "  {:<44} {:>12}",
        "compiled scenario, interpreted, integration",
        ms(compiled)
    );
    println!(
        "  {:<44} {:>12}",
        "hand-coded Rust, same integrator",
        ms(hand)
    );
    println!(
        "  {:<44} {:>12.2}x   (target <= 1.5x)",
        "ratio interpreted / hand-coded",
        compiled.as_secs_f64() / hand.as_secs_f64()
    );
    println!(
        "  {:<44} {:>12.2}x",
        "ratio, median over neighbouring pairs", pair_ratio
    );
    println!(
        "  {:<44} {:>12}",
        "compiled scenario as native code",
        ms(native_time)
    );
    println!(
        "  {:<44} {:>12}",
        "hand-coded Rust (sampled beside native)",
        ms(hand_n)
    );
    println!(
        "  {:<44} {:>12.2}x   (target <= 1.5x)",
        "ratio native / hand-coded",
        native_time.as_secs_f64() / hand_n.as_secs_f64()
    );
    println!(
        "  {:<44} {:>12.2}x",
        "ratio, median over neighbouring pairs", native_pair
    );
    println!(
        "  {:<44} {:>12}",
        "building native code for the 3 stages",
        ms(build_native)
    );
    println!(
        "  {:<44} {:>12}",
        "one right-hand side, native",
        format!("{:.0} ns", nrhs.as_secs_f64() * 1e9)
    );
    println!(
        "  {:<44} {:>12}",
        "one right-hand side, interpreted",
        format!("{:.0} ns", rhs.as_secs_f64() * 1e9)
    );
    println!(
        "  {:<44} {:>12}",
        "one right-hand side, hand-coded",
        format!("{:.0} ns", hrhs.as_secs_f64() * 1e9)
    );
    println!(
        "  {:<44} {:>12}",
        "full solve (compile, events, 451 rows)",
        ms(full)
    );
    println!(
        "  {:<44} {:>12}",
        "parse and check (with include and table)",
        ms(check)
    );
}
