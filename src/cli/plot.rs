//! `hadal plot DIR` and `hadal report DIR`: figures and the one-page
//! report of an existing run or ensemble directory, drawn from its files
//! without recomputing anything.

use std::path::Path;

use super::{usage_error, EXIT_INVALID, EXIT_OK};
use crate::figures::{self, InventoryUnit, RunOptions};

/// Draw the figures of `dir` and write them into it, each atomically.
/// Returns the names written. Used by `hadal plot` and after `hadal run`.
pub(crate) fn write_figures(dir: &Path, opts: &RunOptions) -> Result<Vec<String>, String> {
    write_files(
        dir,
        &figures::draw_dir(dir, opts).map_err(|e| e.to_string())?,
    )
}

/// Write figure files into `dir`, each atomically; returns their names.
pub(crate) fn write_files(dir: &Path, files: &figures::Files) -> Result<Vec<String>, String> {
    let mut names = Vec::with_capacity(files.len());
    for (name, bytes) in files {
        let path = dir.join(name);
        crate::fsutil::write_atomic(&path, bytes)
            .map_err(|e| format!("cannot write {}: {e}", path.display()))?;
        names.push(name.clone());
    }
    Ok(names)
}

fn check_dir(dir: &Path) -> Result<(), i32> {
    if !dir.is_dir() {
        return Err(usage_error(format!("{} is not a directory", dir.display())));
    }
    if figures::dir_kind(dir).is_none() {
        return Err(usage_error(format!(
            "{} holds neither a run (series.csv) nor an ensemble (quantiles.csv)",
            dir.display()
        )));
    }
    Ok(())
}

/// `hadal plot DIR [--kg]`: inventories in ocean masses, or in kg.
pub(crate) fn cmd_plot(dir: &Path, kg: bool) -> i32 {
    if let Err(code) = check_dir(dir) {
        return code;
    }
    let opts = RunOptions {
        inventory: if kg {
            InventoryUnit::Kg
        } else {
            InventoryUnit::OceanMasses
        },
    };
    match write_figures(dir, &opts) {
        Ok(names) if names.is_empty() => {
            println!("{}: nothing to draw", dir.display());
            EXIT_OK
        }
        Ok(names) => {
            println!("wrote {} ({})", dir.display(), names.join(", "));
            EXIT_OK
        }
        Err(e) => {
            eprintln!("error: {e}");
            EXIT_INVALID
        }
    }
}

/// `hadal report DIR`: writes `DIR/report.html`.
pub(crate) fn cmd_report(dir: &Path) -> i32 {
    if let Err(code) = check_dir(dir) {
        return code;
    }
    let html = match figures::html::report(dir) {
        Ok(h) => h,
        Err(e) => {
            eprintln!("error: {e}");
            return EXIT_INVALID;
        }
    };
    let path = dir.join("report.html");
    if let Err(e) = crate::fsutil::write_atomic(&path, html.as_bytes()) {
        return usage_error(format!("cannot write {}: {e}", path.display()));
    }
    println!("wrote {}", path.display());
    EXIT_OK
}
