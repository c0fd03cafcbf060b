//! Parse and check inside one process: medians over repeated runs, without
//! the start-up, first-touch memory and exit of a whole `hadal check`.
//!
//!     cargo bench --bench parse -- FILE...
//!
//! With no file, the two demo scenarios. Prints one JSON line per file:
//! its lines, the median parse time and the median parse-and-check time
//! (with includes and tables), in seconds. `benches/scaling.sh` runs it on
//! its generated 1,250- to 10,000-line scenarios.

#[path = "timing.rs"]
mod timing;

use std::hint::black_box;
use std::path::PathBuf;
use std::time::Duration;

use timing::median;

fn main() {
    // `cargo bench` passes `--bench`; every other argument is a file.
    let mut files: Vec<PathBuf> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with("--"))
        .map(PathBuf::from)
        .collect();
    if files.is_empty() {
        let root = PathBuf::from(env!("CARGO_MANIFEST_DIR"));
        files = vec![
            root.join("scenarios/hot_start.hadal"),
            root.join("scenarios/glacial_window.hadal"),
        ];
    }
    for file in files {
        let text = match std::fs::read_to_string(&file) {
            Ok(t) => t,
            Err(e) => {
                eprintln!("parse bench: cannot read {}: {e}", file.display());
                std::process::exit(2);
            }
        };
        if let Err(e) = hadal::check::check_file(&file, &Default::default()) {
            eprintln!("parse bench: {} does not check: {e:?}", file.display());
            std::process::exit(1);
        }
        let budget = Duration::from_secs(2);
        let parse = median(budget, || {
            black_box(hadal::syntax::parse(black_box(&text), 0).is_ok());
        })
        .as_secs_f64();
        let check = median(budget, || {
            black_box(hadal::check::check_file(&file, &Default::default()).is_ok());
        })
        .as_secs_f64();
        println!(
            "{}",
            serde_json::json!({
                "file": file.display().to_string(),
                "lines": text.lines().count(),
                "parse_s": parse,
                "check_s": check,
            })
        );
    }
}
