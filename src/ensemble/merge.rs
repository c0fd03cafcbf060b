//! Shards and merge: shard states combined into the state of the whole,
//! shard directories into one.

use std::path::{Path, PathBuf};

use super::error::EnsembleError;
use super::write::write_outputs;
use super::EnsembleState;

impl EnsembleState {
    /// Combine shard states; they must come from the same scenario, seed and
    /// member count, and together cover every member exactly once.
    pub fn merge(mut parts: Vec<EnsembleState>) -> Result<EnsembleState, EnsembleError> {
        parts.sort_by_key(|p| p.from);
        let mut it = parts.into_iter();
        let mut acc = it.next().ok_or(EnsembleError::NothingToMerge)?;
        for p in it {
            acc.absorb(&p)?;
        }
        acc.complete()?;
        Ok(acc)
    }

    /// Add the shard that follows this state's members.
    fn absorb(&mut self, p: &EnsembleState) -> Result<(), EnsembleError> {
        let acc = self;
        if p.canonical_hash != acc.canonical_hash
            || p.seed != acc.seed
            || p.total_members != acc.total_members
        {
            let of = |s: &EnsembleState| {
                format!(
                    "scenario {} seed {} members {}",
                    &s.canonical_hash[..12],
                    s.seed,
                    s.total_members
                )
            };
            return Err(EnsembleError::DifferentEnsembles {
                ours: of(acc),
                theirs: of(p),
            });
        }
        if p.from != acc.to {
            return Err(EnsembleError::Gap {
                to: acc.to,
                from: p.from,
            });
        }
        acc.to = p.to;
        acc.accepted += p.accepted;
        acc.failed += p.failed;
        for (a, b) in acc.ranges.iter_mut().zip(&p.ranges) {
            a[0] = a[0].min(b[0]);
            a[1] = a[1].max(b[1]);
            a[2] = a[2].min(b[2]);
            a[3] = a[3].max(b[3]);
        }
        for (a, b) in acc.passes.iter_mut().zip(&p.passes) {
            *a += b;
        }
        for (a, b) in acc.sketches.iter_mut().zip(&p.sketches) {
            a.0.merge(&b.0);
            a.1.merge(&b.1);
        }
        Ok(())
    }

    /// `Err` unless the merged shards cover every member.
    fn complete(&self) -> Result<(), EnsembleError> {
        let acc = self;
        if acc.from != 0 || acc.to != acc.total_members {
            return Err(EnsembleError::Incomplete {
                from: acc.from,
                to: acc.to,
                total: acc.total_members,
            });
        }
        Ok(())
    }
}

/// Write the shards' `members.csv` files, in member order, as one file at
/// `to` (the header once), streaming: memory does not depend on their size.
fn concat_members(dirs: &[PathBuf], to: &Path) -> Result<(), EnsembleError> {
    use std::io::{BufRead, BufReader, Read};
    let tmp = crate::fsutil::temp_path(to);
    let result = (|| {
        let mut dst = std::io::BufWriter::new(
            std::fs::File::create(&tmp)
                .map_err(|e| EnsembleError::io(format!("cannot write {}", to.display()), e))?,
        );
        for (i, d) in dirs.iter().enumerate() {
            let path = d.join("members.csv");
            let (file, _) = crate::fsutil::open_regular(&path, true)
                .map_err(|e| EnsembleError::io(path.display().to_string(), e))?;
            let mut src = BufReader::new(file);
            if i > 0 {
                // Skip the header line, reading at most a header's worth.
                let mut header = Vec::new();
                (&mut src)
                    .take(crate::fsutil::MAX_JSON_BYTES)
                    .read_until(b'\n', &mut header)
                    .map_err(|e| EnsembleError::io(path.display().to_string(), e))?;
            }
            std::io::copy(&mut src, &mut dst)
                .map_err(|e| EnsembleError::io(path.display().to_string(), e))?;
        }
        let f = dst
            .into_inner()
            .map_err(|e| EnsembleError::io(format!("cannot write {}", to.display()), e))?;
        f.sync_all()
            .and_then(|()| std::fs::rename(&tmp, to))
            .map_err(|e| EnsembleError::io(format!("cannot write {}", to.display()), e))
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}

/// Merge shard directories into `out`: members.csv concatenated in member
/// order and the summaries recomputed from the merged state.
pub fn merge_dirs(dirs: &[PathBuf], out: &Path) -> Result<EnsembleState, EnsembleError> {
    let read_state = |d: &Path| -> Result<EnsembleState, EnsembleError> {
        let path = d.join("ensemble.state");
        let b = crate::fsutil::read_bounded(&path, crate::fsutil::MAX_OUTPUT_BYTES)
            .map_err(|e| EnsembleError::io(path.display().to_string(), e))?;
        EnsembleState::from_bytes(&b).map_err(|e| e.within(d.display().to_string()))
    };
    // Shards are read one at a time, twice (first for their order), so
    // that merging holds one shard's sketches beside the sum rather than
    // every shard's at once.
    let mut order = Vec::with_capacity(dirs.len());
    for d in dirs {
        order.push((read_state(d)?.from, d.clone()));
    }
    order.sort_by_key(|(from, _)| *from);
    let mut merged: Option<EnsembleState> = None;
    for (_, d) in &order {
        let s = read_state(d)?;
        match &mut merged {
            None => merged = Some(s),
            Some(acc) => acc.absorb(&s)?,
        }
    }
    let merged = merged.ok_or(EnsembleError::NothingToMerge)?;
    merged.complete()?;
    std::fs::create_dir_all(out)
        .map_err(|e| EnsembleError::io(format!("cannot create {}", out.display()), e))?;
    crate::fsutil::remove_stale_temps(out);
    crate::fsutil::remove_stale_temps(&out.join("series"));
    let shards: Vec<PathBuf> = order.iter().map(|(_, d)| d.clone()).collect();
    concat_members(&shards, &out.join("members.csv"))?;
    for dir in dirs {
        let series = dir.join("series");
        if series.is_dir() {
            std::fs::create_dir_all(out.join("series")).map_err(|e| EnsembleError::io("", e))?;
            for e in std::fs::read_dir(&series)
                .map_err(|e| EnsembleError::io("", e))?
                .flatten()
            {
                crate::fsutil::copy_atomic(&e.path(), &out.join("series").join(e.file_name()))
                    .map_err(|e| EnsembleError::io("", e))?;
            }
        }
    }
    write_outputs(&merged, out)?;
    Ok(merged)
}
