//! Writers: where member rows go (a streamed members.csv or memory), and
//! the summary files (quantiles.csv, summary.json, ensemble.state).

use std::io::Write;
use std::path::{Path, PathBuf};

use super::error::EnsembleError;
use super::sketch::{self, Sketch};
use super::EnsembleState;
use crate::report::{fmt_num, ExpectResult};

const QUANTILES: [f64; 5] = [0.05, 0.25, 0.5, 0.75, 0.95];
const STATE_MAGIC: &[u8; 8] = b"HADALE1\n";

/// One member's row of members.csv, as numbers: what a [`MemberSink`]
/// receives, in member order.
#[derive(Debug, Clone, Copy)]
pub struct MemberRow<'a> {
    pub member: u64,
    /// Parameter values in display units, in the order of the `vary` lines.
    pub values: &'a [f64],
    /// Per constraint: its misfit and whether it passes; empty when the
    /// member failed.
    pub expectations: &'a [ExpectResult],
    pub accepted: bool,
    /// Why the member failed (`None`: it ran).
    pub error: Option<&'a str>,
    /// The member's series as CSV text, when series are kept.
    pub series_csv: Option<&'a [u8]>,
}

/// Where the members of a run go. The caller chooses: [`FileSink`] streams
/// them to members.csv (memory does not grow with the members), and
/// [`MemorySink`] keeps them for a library caller.
pub trait MemberSink {
    /// Before any member: the column names of members.csv (the last,
    /// `status`, holds text), the number of constraints, and whether member
    /// series will come.
    fn begin(
        &mut self,
        columns: &[String],
        constraints: usize,
        keep_series: bool,
    ) -> Result<(), EnsembleError>;
    /// One member, in member order.
    fn member(&mut self, row: &MemberRow<'_>) -> Result<(), EnsembleError>;
    /// After the last member.
    fn finish(&mut self) -> Result<(), EnsembleError>;
    /// The run failed or was stopped: drop anything half-made.
    fn abandon(&mut self);
}

/// members.csv (and `series/member_NNNNNNN.csv` when series are kept) in a
/// directory: streamed to a temporary file that is renamed at the end.
#[derive(Debug)]
pub struct FileSink {
    dir: PathBuf,
    open: Option<(PathBuf, std::io::BufWriter<std::fs::File>)>,
    constraints: usize,
}

impl FileSink {
    /// Nothing is created until the run begins.
    pub fn new(dir: &Path) -> FileSink {
        FileSink {
            dir: dir.to_owned(),
            open: None,
            constraints: 0,
        }
    }

    fn out(&mut self) -> Result<&mut std::io::BufWriter<std::fs::File>, EnsembleError> {
        match &mut self.open {
            Some((_, out)) => Ok(out),
            None => Err(EnsembleError::io("", "members.csv is not open")),
        }
    }
}

impl MemberSink for FileSink {
    fn begin(
        &mut self,
        columns: &[String],
        constraints: usize,
        keep_series: bool,
    ) -> Result<(), EnsembleError> {
        self.constraints = constraints;
        let dir = &self.dir;
        std::fs::create_dir_all(dir)
            .map_err(|e| EnsembleError::io(format!("cannot create {}", dir.display()), e))?;
        // Temporary files of an earlier run that was killed.
        crate::fsutil::remove_stale_temps(dir);
        crate::fsutil::remove_stale_temps(&dir.join("series"));
        let tmp = crate::fsutil::temp_path(&dir.join("members.csv"));
        let file = std::fs::File::create(&tmp)
            .map_err(|e| EnsembleError::io(format!("cannot write {}", tmp.display()), e))?;
        self.open = Some((tmp, std::io::BufWriter::new(file)));
        write_csv_row(self.out()?, columns).map_err(|e| EnsembleError::io("", e))?;
        if keep_series {
            std::fs::create_dir_all(self.dir.join("series"))
                .map_err(|e| EnsembleError::io("", e))?;
        }
        Ok(())
    }

    fn member(&mut self, r: &MemberRow<'_>) -> Result<(), EnsembleError> {
        let mut row = vec![r.member.to_string()];
        row.extend(r.values.iter().map(|v| fmt_num(*v)));
        for e in r.expectations {
            row.push(fmt_num(e.misfit));
            row.push(if e.pass { "yes" } else { "no" }.into());
        }
        if r.expectations.is_empty() {
            for _ in 0..self.constraints {
                row.push(String::new());
                row.push("no".into());
            }
        }
        row.push(if r.accepted { "yes" } else { "no" }.into());
        row.push(r.error.unwrap_or("ok").to_owned());
        write_csv_row(self.out()?, &row).map_err(|e| EnsembleError::io("", e))?;
        if let Some(csv) = r.series_csv {
            let p = self
                .dir
                .join("series")
                .join(format!("member_{:07}.csv", r.member));
            crate::fsutil::write_atomic(&p, csv)
                .map_err(|e| EnsembleError::io(format!("cannot write {}", p.display()), e))?;
        }
        Ok(())
    }

    fn finish(&mut self) -> Result<(), EnsembleError> {
        let (tmp, out) = self
            .open
            .take()
            .ok_or_else(|| EnsembleError::io("", "members.csv is not open"))?;
        let file = out.into_inner().map_err(|e| EnsembleError::io("", e))?;
        file.sync_all().map_err(|e| EnsembleError::io("", e))?;
        std::fs::rename(&tmp, self.dir.join("members.csv")).map_err(|e| EnsembleError::io("", e))
    }

    fn abandon(&mut self) {
        if let Some((tmp, out)) = self.open.take() {
            drop(out);
            let _ = std::fs::remove_file(&tmp);
        }
    }
}

/// The members kept in memory, for a library caller that wants the numbers
/// (it holds every member: for very large ensembles use [`FileSink`]).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct MemorySink {
    /// The column names of members.csv; `rows` holds every one but the
    /// last (`status`), which is in `status`.
    pub columns: Vec<String>,
    /// Row-major, `columns.len() - 1` numbers a member: the member number,
    /// parameter values (display units), misfit and pass (1 or 0) per
    /// constraint (a failed member's misfits are NaN), accepted (1 or 0).
    pub rows: Vec<f64>,
    /// Per member: "ok", or why it failed.
    pub status: Vec<String>,
    /// Member numbers and series CSV text, when series are kept.
    pub series: Vec<(u64, Vec<u8>)>,
    constraints: usize,
}

impl MemorySink {
    /// Members held.
    pub fn len(&self) -> usize {
        self.status.len()
    }

    pub fn is_empty(&self) -> bool {
        self.status.is_empty()
    }

    /// The numbers of member row `i` (counted from the first member held).
    pub fn row(&self, i: usize) -> &[f64] {
        let w = self.columns.len().saturating_sub(1);
        &self.rows[i * w..(i + 1) * w]
    }
}

impl MemberSink for MemorySink {
    fn begin(
        &mut self,
        columns: &[String],
        constraints: usize,
        _keep_series: bool,
    ) -> Result<(), EnsembleError> {
        *self = MemorySink {
            columns: columns.to_vec(),
            constraints,
            ..MemorySink::default()
        };
        Ok(())
    }

    fn member(&mut self, r: &MemberRow<'_>) -> Result<(), EnsembleError> {
        // Bounded by the check's member limit times the row width; a
        // failed reservation is an error, not an abort.
        let w = self.columns.len().saturating_sub(1);
        self.rows
            .try_reserve(w)
            .map_err(|_| EnsembleError::io("members in memory", "out of memory"))?;
        self.rows.push(r.member as f64);
        self.rows.extend_from_slice(r.values);
        for k in 0..self.constraints {
            match r.expectations.get(k) {
                Some(e) => self.rows.extend([e.misfit, f64::from(u8::from(e.pass))]),
                None => self.rows.extend([f64::NAN, 0.0]),
            }
        }
        self.rows.push(f64::from(u8::from(r.accepted)));
        self.status.push(r.error.unwrap_or("ok").to_owned());
        if let Some(csv) = r.series_csv {
            self.series.push((r.member, csv.to_vec()));
        }
        Ok(())
    }

    fn finish(&mut self) -> Result<(), EnsembleError> {
        Ok(())
    }

    fn abandon(&mut self) {
        *self = MemorySink::default();
    }
}

fn write_csv_row(out: &mut impl Write, cells: &[String]) -> std::io::Result<()> {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .from_writer(Vec::new());
    w.write_record(cells)?;
    out.write_all(
        &w.into_inner()
            .map_err(|e| std::io::Error::other(e.to_string()))?,
    )
}

impl EnsembleState {
    pub fn quantiles_csv(&self) -> Vec<u8> {
        let mut w = csv::WriterBuilder::new()
            .terminator(csv::Terminator::Any(b'\n'))
            .from_writer(Vec::new());
        let mut header = vec![
            "age [Ga]".to_owned(),
            "variable".to_owned(),
            "unit".to_owned(),
        ];
        for set in ["all", "accepted"] {
            for q in QUANTILES {
                header.push(format!("{set}_q{:02}", (q * 100.0).round() as u32));
            }
        }
        let _ = w.write_record(&header);
        let nv = self.variables.len();
        for (t, age) in self.ages.iter().enumerate() {
            for (j, (name, unit)) in self.variables.iter().enumerate() {
                let (all, acc) = &self.sketches[t * nv + j];
                let mut row = vec![fmt_num(age / 1e9), name.clone(), unit.clone()];
                for s in [all, acc] {
                    for q in QUANTILES {
                        row.push(s.quantile(q).map(fmt_num).unwrap_or_default());
                    }
                }
                let _ = w.write_record(&row);
            }
        }
        w.into_inner().unwrap_or_default()
    }

    pub fn summary_json(&self) -> Vec<u8> {
        let n = self.members();
        let num = |v: f64| {
            if v.is_finite() {
                serde_json::json!(v)
            } else {
                serde_json::Value::Null
            }
        };
        let params: Vec<serde_json::Value> = self
            .params
            .iter()
            .zip(&self.ranges)
            .map(|((name, unit), r)| {
                serde_json::json!({
                    "name": name,
                    "unit": unit,
                    "all": {"min": num(r[0]), "max": num(r[1])},
                    "accepted": {"min": num(r[2]), "max": num(r[3])},
                })
            })
            .collect();
        let constraints: Vec<serde_json::Value> = self
            .constraints
            .iter()
            .enumerate()
            .map(|(k, c)| {
                let sens: serde_json::Map<String, serde_json::Value> = self
                    .params
                    .iter()
                    .enumerate()
                    .map(|(j, (p, _))| {
                        (
                            p.clone(),
                            num(self
                                .sensitivity
                                .get(k)
                                .and_then(|r| r.get(j))
                                .copied()
                                .unwrap_or(f64::NAN)),
                        )
                    })
                    .collect();
                serde_json::json!({
                    "id": k + 1,
                    "expectation": c,
                    "pass_rate": if n > 0 { self.passes[k] as f64 / n as f64 } else { 0.0 },
                    "elasticity_at_nominal": sens,
                })
            })
            .collect();
        let v = serde_json::json!({
            "scenario": self.scenario,
            "canonical_hash": self.canonical_hash,
            "seed": self.seed,
            "members": n,
            "accepted": self.accepted,
            "failed": self.failed,
            "acceptance_rate": if n > 0 { self.accepted as f64 / n as f64 } else { 0.0 },
            "quantile_relative_accuracy": sketch::ALPHA,
            "parameters": params,
            "constraints": constraints,
            "sensitivity_method": "one at a time: elasticity d ln(value) / d ln(parameter) by a 1 % forward step at the nominal parameter values",
        });
        let mut b = serde_json::to_vec_pretty(&v).unwrap_or_default();
        b.push(b'\n');
        b
    }

    pub fn to_bytes(&self) -> Vec<u8> {
        let mut o = Vec::new();
        o.extend_from_slice(STATE_MAGIC);
        let meta = serde_json::json!({
            "scenario": self.scenario, "canonical_hash": self.canonical_hash, "seed": self.seed,
            "total_members": self.total_members, "from": self.from, "to": self.to,
            "params": self.params, "constraints": self.constraints, "variables": self.variables,
            "ages_bits": self.ages.iter().map(|a| a.to_bits()).collect::<Vec<_>>(),
            "accepted": self.accepted, "failed": self.failed,
            "ranges_bits": self.ranges.iter().map(|r| r.map(f64::to_bits)).collect::<Vec<_>>(),
            "passes": self.passes,
            "sensitivity_bits": self.sensitivity.iter().map(|r| r.iter().map(|v| v.to_bits()).collect::<Vec<_>>()).collect::<Vec<_>>(),
        });
        let m = serde_json::to_vec(&meta).unwrap_or_default();
        o.extend_from_slice(&(m.len() as u64).to_le_bytes());
        o.extend_from_slice(&m);
        for (a, b) in &self.sketches {
            a.write(&mut o);
            b.write(&mut o);
        }
        let h = blake3::hash(&o);
        o.extend_from_slice(h.as_bytes());
        o
    }

    pub fn from_bytes(b: &[u8]) -> Result<EnsembleState, EnsembleError> {
        let bad = |m: &str| EnsembleError::StateFile(m.to_owned());
        if b.len() < 48 || &b[..8] != STATE_MAGIC {
            return Err(bad("not an ensemble state file"));
        }
        let (body, hash) = b.split_at(b.len() - 32);
        if blake3::hash(body).as_bytes() != hash {
            return Err(bad(
                "the ensemble state file is damaged (checksum mismatch)",
            ));
        }
        let len = u64::from_le_bytes(body[8..16].try_into().map_err(|_| bad("short"))?) as usize;
        let meta: serde_json::Value =
            serde_json::from_slice(body.get(16..16 + len).ok_or_else(|| bad("short"))?)
                .map_err(|e| bad(&e.to_string()))?;
        let mut rest = &body[16 + len..];
        let get_u = |k: &str| meta[k].as_u64().ok_or_else(|| bad(&format!("missing {k}")));
        let strs = |k: &str| -> Vec<String> {
            meta[k]
                .as_array()
                .map(|a| {
                    a.iter()
                        .filter_map(|s| s.as_str().map(str::to_owned))
                        .collect()
                })
                .unwrap_or_default()
        };
        let pairs = |k: &str| -> Vec<(String, String)> {
            meta[k]
                .as_array()
                .map(|a| {
                    a.iter()
                        .filter_map(|p| {
                            Some((p[0].as_str()?.to_owned(), p[1].as_str()?.to_owned()))
                        })
                        .collect()
                })
                .unwrap_or_default()
        };
        let bits = |v: &serde_json::Value| f64::from_bits(v.as_u64().unwrap_or(0));
        let variables = pairs("variables");
        let ages: Vec<f64> = meta["ages_bits"]
            .as_array()
            .map(|a| a.iter().map(bits).collect())
            .unwrap_or_default();
        let mut sketches = Vec::with_capacity(ages.len() * variables.len());
        for _ in 0..ages.len() * variables.len() {
            let a = Sketch::read(&mut rest).ok_or_else(|| bad("damaged sketch"))?;
            let c = Sketch::read(&mut rest).ok_or_else(|| bad("damaged sketch"))?;
            sketches.push((a, c));
        }
        Ok(EnsembleState {
            scenario: meta["scenario"].as_str().unwrap_or("").to_owned(),
            canonical_hash: meta["canonical_hash"].as_str().unwrap_or("").to_owned(),
            seed: get_u("seed")?,
            total_members: get_u("total_members")?,
            from: get_u("from")?,
            to: get_u("to")?,
            params: pairs("params"),
            constraints: strs("constraints"),
            variables,
            ages,
            accepted: get_u("accepted")?,
            failed: get_u("failed")?,
            ranges: meta["ranges_bits"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|r| [bits(&r[0]), bits(&r[1]), bits(&r[2]), bits(&r[3])])
                        .collect()
                })
                .unwrap_or_default(),
            passes: meta["passes"]
                .as_array()
                .map(|a| a.iter().filter_map(|v| v.as_u64()).collect())
                .unwrap_or_default(),
            sensitivity: meta["sensitivity_bits"]
                .as_array()
                .map(|a| {
                    a.iter()
                        .map(|r| {
                            r.as_array()
                                .map(|x| x.iter().map(bits).collect())
                                .unwrap_or_default()
                        })
                        .collect()
                })
                .unwrap_or_default(),
            sketches,
        })
    }
}

/// Write the summary files of a (merged or unsharded) state into `dir`.
pub fn write_outputs(state: &EnsembleState, dir: &Path) -> Result<Vec<PathBuf>, EnsembleError> {
    let files = [
        ("quantiles.csv", state.quantiles_csv()),
        ("summary.json", state.summary_json()),
        ("ensemble.state", state.to_bytes()),
    ];
    let mut out = Vec::new();
    for (name, bytes) in files {
        let p = dir.join(name);
        crate::fsutil::write_atomic(&p, &bytes)
            .map_err(|e| EnsembleError::io(format!("cannot write {}", p.display()), e))?;
        out.push(p);
    }
    Ok(out)
}
