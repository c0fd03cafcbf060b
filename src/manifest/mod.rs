//! Reproducibility: the manifest written beside every run's outputs, exact
//! re-verification, and comparison of two runs.
//!
//! The manifest has two parts. `compared` holds only what must be the same
//! for the same inputs on any machine: versions, the scenario's canonical
//! hash, every input file's hash (paths relative to the project root), the
//! overrides, solver settings, per-stage fingerprints and closure errors,
//! and every output file's hash and size. `run` holds facts about this
//! particular run (platform, where the project root was, which stages came
//! from the cache, wall time) and is never compared.
//!
//! A manifest may come from someone else: `verify` ([`verify::open`])
//! confines every path it names to its project root and reruns from the
//! very bytes whose hashes it checked.
//!
//! Invariant: this module reads and compares files and manifests; it runs
//! the pipeline only through `pipeline::execute`.

use std::path::{Component, Path};

use serde::{Deserialize, Serialize};

use crate::model::Model;
use crate::pipeline::Outcome;

pub mod diff;
pub mod verify;

pub const FORMAT: &str = "hadal-manifest-1";

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Manifest {
    pub format: String,
    pub compared: Compared,
    pub run: RunFacts,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Compared {
    pub hadal_version: String,
    pub engine_version: u32,
    pub scenario: ScenarioId,
    pub inputs: Vec<FileHash>,
    pub overrides: Vec<Override>,
    pub solver: Vec<StageSolver>,
    pub stages: Vec<StageEntry>,
    pub outputs: Vec<FileHash>,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct ScenarioId {
    pub name: String,
    /// Path of the scenario file relative to the project root.
    pub path: String,
    /// blake3 of the canonical form of the whole model: independent of
    /// comments, layout and declaration order.
    pub canonical_hash: String,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct FileHash {
    pub path: String,
    pub blake3: String,
    pub bytes: u64,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct Override {
    pub name: String,
    pub value: String,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StageSolver {
    pub stage: String,
    pub method: String,
    pub rtol: f64,
    pub atol: f64,
    pub max_step_yr: Option<f64>,
    pub initial_step_yr: Option<f64>,
    pub max_steps: u64,
    pub budget_tolerance: f64,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct StageEntry {
    pub name: String,
    pub from_ga: f64,
    pub to_ga: f64,
    pub fingerprint: String,
    pub method: String,
    pub closure_error: f64,
}

#[derive(Debug, Clone, Serialize, Deserialize, PartialEq)]
pub struct RunFacts {
    pub platform: String,
    /// The project root as seen from the manifest's directory.
    pub project_root_from_manifest: String,
    pub stage_status: Vec<String>,
    pub series_reused: bool,
    pub wall_ms: f64,
}

/// blake3 of the model's canonical form.
pub fn canonical_hash(model: &Model) -> String {
    let mut defs: Vec<String> = model
        .defs
        .iter()
        .enumerate()
        .filter(|(_, d)| !d.prelude)
        .map(|(i, _)| model.canonical_def(i))
        .collect();
    defs.sort();
    let mut h = blake3::Hasher::new();
    h.update(
        format!(
            "span {} {} every {}\n",
            model.start_age, model.end_age, model.cadence
        )
        .as_bytes(),
    );
    h.update(format!("solver {:?}\n", model.solver).as_bytes());
    for d in &defs {
        h.update(d.as_bytes());
        h.update(b"\n");
    }
    for st in &model.stages {
        let sets: Vec<String> = st
            .sets
            .iter()
            .map(|(p, e)| format!("{} = {}", model.defs[*p].name, model.canonical_expr(e)))
            .collect();
        h.update(
            format!(
                "stage {} {} {} {:?} {:?}\n",
                st.name, st.start_age, st.end_age, st.solver, sets
            )
            .as_bytes(),
        );
    }
    for e in &model.expects {
        // Canonical expressions, not `Debug` of them: that would hold byte
        // offsets, and reformatting the file would change the hash.
        use crate::model::ExpectCheck;
        let c = |x: &crate::model::Expr| model.canonical_expr(x);
        let check = match &e.check {
            ExpectCheck::Target { age, value, sigma } => {
                format!("at {age} = {} +- {}", c(value), c(sigma))
            }
            ExpectCheck::Range { age, low, high } => {
                format!("at {age} in {} to {}", c(low), c(high))
            }
            ExpectCheck::Bound { age, op, value } => {
                format!("at {age} {} {}", op.symbol(), c(value))
            }
            ExpectCheck::Event { event, before, age } => format!(
                "{} {} {age}",
                model.defs[*event].name,
                if *before { "before" } else { "after" }
            ),
        };
        h.update(format!("expect {} {check}\n", model.canonical_expr(&e.subject)).as_bytes());
    }
    h.finalize().to_hex().to_string()
}

pub fn hash_bytes(b: &[u8]) -> String {
    blake3::hash(b).to_hex().to_string()
}

/// `path` relative to `base`, with `/` separators; both are made absolute.
pub fn relative(path: &Path, base: &Path) -> String {
    let abs = |p: &Path| std::fs::canonicalize(p).unwrap_or_else(|_| p.to_owned());
    let (p, b) = (abs(path), abs(base));
    let pc: Vec<Component> = p.components().collect();
    let bc: Vec<Component> = b.components().collect();
    let common = pc.iter().zip(&bc).take_while(|(x, y)| x == y).count();
    let mut out: Vec<String> = Vec::new();
    for _ in common..bc.len() {
        out.push("..".into());
    }
    for c in &pc[common..] {
        out.push(c.as_os_str().to_string_lossy().into_owned());
    }
    if out.is_empty() {
        ".".into()
    } else {
        out.join("/")
    }
}

pub fn platform() -> String {
    format!("{}-{}", std::env::consts::OS, std::env::consts::ARCH)
}

/// Build the manifest of a finished run whose output files are `outputs`
/// (name and bytes) in `out_dir`.
pub fn build(
    model: &Model,
    scenario_path: &Path,
    overrides: &[(String, String)],
    outcome: &Outcome,
    outputs: &[(&str, Vec<u8>)],
    out_dir: &Path,
    wall_ms: f64,
) -> Manifest {
    let root = crate::check::project_root(scenario_path);
    let mut inputs: Vec<FileHash> = model
        .sources
        .files
        .iter()
        .filter(|f| !f.path.as_os_str().is_empty())
        .map(|f| FileHash {
            path: relative(&f.path, &root),
            blake3: hash_bytes(f.text.as_bytes()),
            bytes: f.text.len() as u64,
        })
        .collect();
    // Table files are read as bytes; hash those bytes, not the text view.
    for t in &model.tables {
        let rel = relative(&t.path, &root);
        if let Some(i) = inputs.iter_mut().find(|i| i.path == rel) {
            if let Ok(b) = crate::fsutil::read_bounded(&t.path, crate::check::MAX_FILE_BYTES) {
                i.blake3 = hash_bytes(&b);
                i.bytes = b.len() as u64;
            }
        }
    }
    inputs.sort_by(|a, b| a.path.cmp(&b.path));
    inputs.dedup_by(|a, b| a.path == b.path);
    let solver = model
        .stages
        .iter()
        .map(|st| StageSolver {
            stage: st.name.clone(),
            method: crate::solve::method_word(st.solver.method).to_owned(),
            rtol: st.solver.rtol,
            atol: st.solver.atol,
            max_step_yr: st.solver.max_step,
            initial_step_yr: st.solver.initial_step,
            max_steps: st.solver.max_steps,
            budget_tolerance: st.solver.budget_tolerance,
        })
        .collect();
    let stages = outcome
        .run
        .stages
        .iter()
        .zip(&outcome.stages)
        .map(|(sr, rp)| {
            let st = &model.stages[sr.stage];
            StageEntry {
                name: st.name.clone(),
                from_ga: st.start_age / 1e9,
                to_ga: st.end_age / 1e9,
                fingerprint: rp.fingerprint.clone(),
                method: crate::report::method_text(model, &sr.stats),
                closure_error: sr.closure_error,
            }
        })
        .collect();
    let outputs = outputs
        .iter()
        .map(|(name, b)| FileHash {
            path: (*name).to_owned(),
            blake3: hash_bytes(b),
            bytes: b.len() as u64,
        })
        .collect();
    Manifest {
        format: FORMAT.into(),
        compared: Compared {
            hadal_version: env!("CARGO_PKG_VERSION").into(),
            engine_version: crate::solve::ENGINE_VERSION,
            scenario: ScenarioId {
                name: model.name.clone().unwrap_or_default(),
                path: relative(scenario_path, &root),
                canonical_hash: canonical_hash(model),
            },
            inputs,
            overrides: overrides
                .iter()
                .map(|(n, v)| Override {
                    name: n.clone(),
                    value: v.clone(),
                })
                .collect(),
            solver,
            stages,
            outputs,
        },
        run: RunFacts {
            platform: platform(),
            project_root_from_manifest: relative(&root, out_dir),
            stage_status: outcome
                .stages
                .iter()
                .map(|s| s.status.word().to_owned())
                .collect(),
            series_reused: outcome.series_reused,
            wall_ms,
        },
    }
}

impl Manifest {
    pub fn to_json(&self) -> Vec<u8> {
        let mut v = serde_json::to_vec_pretty(self).unwrap_or_default();
        v.push(b'\n');
        v
    }

    /// Read a manifest: a regular file of at most
    /// [`verify::MAX_MANIFEST_BYTES`], never a pipe or a device. To verify
    /// one, use [`verify::open`], which also confines its paths.
    pub fn read(path: &Path) -> Result<Manifest, verify::ManifestError> {
        verify::read_manifest(path)
    }
}

// ---- comparing CSV outputs -----------------------------------------------

/// How two CSV tables differ.
#[derive(Debug, Clone, PartialEq)]
pub struct CsvDiff {
    /// The first differing cell: column name, age (first column) and values.
    pub first: Option<(String, String, String, String)>,
    /// Per column: name, largest absolute and relative difference, and the
    /// first age where they differ.
    pub columns: Vec<ColumnDiff>,
    /// Structural differences (header, row count).
    pub shape: Vec<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct ColumnDiff {
    pub name: String,
    pub max_abs: f64,
    pub max_rel: f64,
    pub first_age: Option<String>,
}

impl CsvDiff {
    pub fn max_rel(&self) -> f64 {
        self.columns.iter().map(|c| c.max_rel).fold(0.0, f64::max)
    }
    pub fn identical(&self) -> bool {
        self.first.is_none() && self.shape.is_empty()
    }
}

fn parse_csv(bytes: &[u8]) -> Option<(Vec<String>, Vec<Vec<String>>)> {
    let mut r = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_reader(bytes);
    let header: Vec<String> = r.headers().ok()?.iter().map(str::to_owned).collect();
    let mut rows = Vec::new();
    for rec in r.records() {
        rows.push(rec.ok()?.iter().map(str::to_owned).collect());
    }
    Some((header, rows))
}

/// Compare two CSV files cell by cell; numbers by value, text by equality.
pub fn diff_csv(a: &[u8], b: &[u8]) -> CsvDiff {
    let mut d = CsvDiff {
        first: None,
        columns: Vec::new(),
        shape: Vec::new(),
    };
    let (Some((ha, ra)), Some((hb, rb))) = (parse_csv(a), parse_csv(b)) else {
        d.shape.push("one of the files is not readable CSV".into());
        return d;
    };
    if ha != hb {
        d.shape.push(format!(
            "the headers differ: [{}] against [{}]",
            ha.join(", "),
            hb.join(", ")
        ));
    }
    if ra.len() != rb.len() {
        d.shape
            .push(format!("{} rows against {}", ra.len(), rb.len()));
    }
    for (c, name) in ha.iter().enumerate() {
        let Some(cb) = hb.iter().position(|h| h == name) else {
            continue;
        };
        let mut col = ColumnDiff {
            name: name.clone(),
            max_abs: 0.0,
            max_rel: 0.0,
            first_age: None,
        };
        for (row_a, row_b) in ra.iter().zip(&rb) {
            let (Some(x), Some(y)) = (row_a.get(c), row_b.get(cb)) else {
                continue;
            };
            if x == y {
                continue;
            }
            let age = row_a.first().cloned().unwrap_or_default();
            if col.first_age.is_none() {
                col.first_age = Some(age.clone());
            }
            if d.first.is_none() {
                d.first = Some((name.clone(), age, x.clone(), y.clone()));
            }
            match (x.parse::<f64>(), y.parse::<f64>()) {
                (Ok(u), Ok(v)) => {
                    let abs = (u - v).abs();
                    let scale = u.abs().max(v.abs());
                    let rel = if scale > 0.0 { abs / scale } else { 0.0 };
                    col.max_abs = col.max_abs.max(abs);
                    col.max_rel = col.max_rel.max(rel);
                }
                _ => {
                    col.max_abs = f64::INFINITY;
                    col.max_rel = f64::INFINITY;
                }
            }
        }
        if col.first_age.is_some() {
            d.columns.push(col);
        }
    }
    d
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_diff_finds_first_cell_and_largest_relative_difference() {
        let a = b"age [Ga],x [kg],y [K]\n4.5,1,10\n4,2,20\n3.5,3,30\n";
        let b = b"age [Ga],x [kg],y [K]\n4.5,1,10\n4,2.002,20\n3.5,3.3,30\n";
        let d = diff_csv(a, b);
        assert_eq!(
            d.first,
            Some(("x [kg]".into(), "4".into(), "2".into(), "2.002".into()))
        );
        assert_eq!(d.columns.len(), 1);
        assert!((d.columns[0].max_rel - 0.3 / 3.3).abs() < 1e-12);
        assert!((d.columns[0].max_abs - 0.3).abs() < 1e-12);
        assert!(diff_csv(a, a).identical());
    }

    #[test]
    fn relative_paths() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        std::fs::create_dir_all(root.join("scenarios/shared")).unwrap();
        std::fs::create_dir_all(root.join("outputs/x")).unwrap();
        std::fs::write(root.join("scenarios/shared/t.csv"), "a").unwrap();
        assert_eq!(
            relative(&root.join("scenarios/shared/t.csv"), root),
            "scenarios/shared/t.csv"
        );
        assert_eq!(relative(root, &root.join("outputs/x")), "../..");
    }
}
