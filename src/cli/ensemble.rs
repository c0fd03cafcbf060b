//! `hadal ensemble` and `hadal merge`.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::time::Instant;

use super::run::load;
use super::{usage_error, EXIT_INVALID, EXIT_OK};
use crate::ensemble::{self, Options};

fn parse_shard(s: &str) -> Result<(u64, u64), String> {
    let bad = || format!("`--shard {s}` is not K/N with 1 <= K <= N, e.g. --shard 3/8");
    let (k, n) = s.split_once('/').ok_or_else(bad)?;
    let k: u64 = k.trim().parse().map_err(|_| bad())?;
    let n: u64 = n.trim().parse().map_err(|_| bad())?;
    if k == 0 || n == 0 || k > n {
        return Err(bad());
    }
    Ok((k, n))
}

#[allow(clippy::too_many_arguments)]
pub(crate) fn cmd_ensemble(
    file: &Path,
    members: Option<u64>,
    seed: Option<u64>,
    shard: Option<&str>,
    out: Option<&Path>,
    threads: Option<usize>,
    keep_series: bool,
    use_cache: bool,
    plots: bool,
) -> i32 {
    let clock = Instant::now();
    let shard = match shard.map(parse_shard).transpose() {
        Ok(s) => s.unwrap_or((1, 1)),
        Err(e) => return usage_error(e),
    };
    if members == Some(0) {
        return usage_error("--members must be at least 1");
    }
    if let Some(m) = members.filter(|&m| m > crate::check::MAX_MEMBERS) {
        return usage_error(format!(
            "--members {m} is more than the limit of {}; split the study into shards (--shard K/N)",
            crate::check::MAX_MEMBERS
        ));
    }
    if threads == Some(0) {
        return usage_error("--threads must be at least 1");
    }
    if let Some(t) = threads.filter(|&t| t > super::MAX_THREADS) {
        return usage_error(format!(
            "--threads {t} is more than the limit of {}; results do not depend on the thread count, and more threads than cores only cost memory",
            super::MAX_THREADS
        ));
    }
    let store = match super::optional_store(use_cache) {
        Ok(s) => s,
        Err(code) => return code,
    };
    let scenario = match load(file, &[]) {
        Ok(s) => s,
        Err(code) => return code,
    };
    let model = scenario.model();
    if model.ensemble.is_none() {
        eprintln!(
            "note: {} has no `ensemble {{ }}` block; every member runs the nominal parameters",
            file.display()
        );
    }
    let name = model.name.clone().unwrap_or_default();
    let dir = out.map(Path::to_owned).unwrap_or_else(|| {
        let base = format!("{name}_ensemble");
        if shard.1 > 1 {
            PathBuf::from("outputs").join(format!("{base}_shard_{}_of_{}", shard.0, shard.1))
        } else {
            PathBuf::from("outputs").join(base)
        }
    });
    // The bar is the CLI's: the library only reports counts, and only a
    // terminal gets a bar.
    let bar = std::io::stderr().is_terminal().then(progress_bar);
    let opts = Options {
        members,
        seed,
        shard,
        threads,
        keep_series,
        store,
        progress: bar.clone().map(|b| {
            ensemble::Progress(std::sync::Arc::new(move |done, total| {
                b.set_length(total);
                b.set_position(done);
            }))
        }),
    };
    // members.csv is streamed to disk as the members run.
    let ran = ensemble::run(model, &opts, &mut ensemble::FileSink::new(&dir));
    if let Some(b) = &bar {
        b.finish_and_clear();
    }
    let ran = match ran {
        Ok(r) => {
            super::report(&model.sources, &r.warnings);
            r
        }
        Err(_) if crate::cancel::requested() => return super::interrupted(),
        Err(e) => {
            eprintln!("error: {e}");
            return EXIT_INVALID;
        }
    };
    if let Err(e) = ran.write(&dir) {
        return usage_error(e);
    }
    let state = &ran.state;
    // Stopped after the last member: the outputs are complete, the figures
    // are left out.
    if crate::cancel::requested() {
        return super::interrupted();
    }
    // A shard holds only part of the members: figures come after the merge.
    if plots && shard.1 == 1 {
        if let Err(e) = super::plot::write_figures(&dir, &crate::figures::RunOptions::default()) {
            eprintln!("warning: figures not drawn: {e}");
        }
    }
    let n = state.members();
    let wall = clock.elapsed().as_secs_f64();
    println!(
        "{name}: {n} members{} (seed {}), {} accepted ({:.1} %), {} failed",
        if shard.1 > 1 {
            format!(
                " of {} (shard {}/{})",
                state.total_members, shard.0, shard.1
            )
        } else {
            String::new()
        },
        state.seed,
        state.accepted,
        if n > 0 {
            100.0 * state.accepted as f64 / n as f64
        } else {
            0.0
        },
        state.failed
    );
    for (k, c) in state.constraints.iter().enumerate() {
        println!(
            "  {:>5.1} % pass: {c}",
            100.0 * state.passes[k] as f64 / n.max(1) as f64
        );
    }
    println!(
        "wrote {} (members.csv, quantiles.csv, summary.json) in {:.2} s ({:.0} members/s)",
        dir.display(),
        wall,
        n as f64 / wall.max(1e-9)
    );
    EXIT_OK
}

pub(crate) fn cmd_merge(dirs: &[PathBuf], out: Option<&Path>) -> i32 {
    let out = match out {
        Some(o) => o.to_owned(),
        None => {
            // Default: the unsharded name beside the first shard.
            let first = &dirs[0];
            let name = first
                .file_name()
                .map(|n| n.to_string_lossy().into_owned())
                .unwrap_or_default();
            let base = name.split("_shard_").next().unwrap_or(&name).to_owned();
            first.parent().unwrap_or(Path::new(".")).join(base)
        }
    };
    match ensemble::merge_dirs(dirs, &out) {
        Ok(s) => {
            if let Err(e) = super::plot::write_figures(&out, &crate::figures::RunOptions::default())
            {
                eprintln!("warning: figures not drawn: {e}");
            }
            println!(
                "merged {} shards into {}: {} members, {} accepted",
                dirs.len(),
                out.display(),
                s.members(),
                s.accepted
            );
            EXIT_OK
        }
        Err(e) => {
            eprintln!("error: {e}");
            EXIT_INVALID
        }
    }
}

/// The ensemble's progress bar on standard error.
fn progress_bar() -> indicatif::ProgressBar {
    let b = indicatif::ProgressBar::new(0);
    b.set_style(
        indicatif::ProgressStyle::with_template(
            "{bar:40} {pos}/{len} members  {per_sec}  eta {eta}",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    b
}
