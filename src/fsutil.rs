//! Writing files so that a reader never sees half of one.
//!
//! Every file is written to a temporary file beside it, named
//! `.NAME.tmp-HOST-PID-N`, flushed, and renamed over the target. A process
//! killed mid-write leaves only such a temporary file, never a half-written
//! target; [`remove_stale_temps`] clears them (the next `hadal run` does so
//! in its output directory, `hadal cache gc` in the cache).

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::OnceLock;
use std::time::{Duration, SystemTime};

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// A temporary file of another machine (a shared file system) is removed
/// only when it is older than this: its writer cannot be asked whether it
/// is still running, and no write takes that long.
pub const FOREIGN_TEMP_AGE: Duration = Duration::from_secs(3600);

/// Write `bytes` to `path` through a temporary file in the same directory,
/// flushed to disk, then renamed over the target. On error the temporary
/// file is removed and the target is untouched.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_renamed(path, &[bytes], true, true)
}

/// Like [`write_atomic`], flushing the file but not its directory: after a
/// power cut the file is whole or absent, never partial. For
/// content-addressed cache entries, whose loss costs only a recomputation;
/// it saves one of the two disk flushes per entry.
pub fn write_atomic_entry(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_renamed(path, &[bytes], true, false)
}

/// [`write_atomic_entry`] of the concatenation of `parts`, without making
/// it in memory first (a large payload between a small head and tail would
/// otherwise be held twice).
pub fn write_atomic_entry_parts(path: &Path, parts: &[&[u8]]) -> std::io::Result<()> {
    write_renamed(path, parts, true, false)
}

/// Like [`write_atomic`] without flushing to disk: a reader still sees a
/// whole file or none, but a power cut may lose it. For hint files only.
pub fn write_atomic_unsynced(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_renamed(path, &[bytes], false, false)
}

/// This machine's name as it appears in temporary file names (no `-`).
fn host() -> &'static str {
    static HOST: OnceLock<String> = OnceLock::new();
    HOST.get_or_init(|| {
        let raw = host_name().unwrap_or_else(|| "localhost".into());
        let clean: String = raw
            .chars()
            .map(|c| {
                if c.is_ascii_alphanumeric() || c == '.' || c == '_' {
                    c
                } else {
                    '_'
                }
            })
            .take(64)
            .collect();
        if clean.is_empty() {
            "localhost".into()
        } else {
            clean
        }
    })
}

#[cfg(unix)]
fn host_name() -> Option<String> {
    let mut buf = [0u8; 256];
    // SAFETY: the buffer is valid for its length; gethostname writes at most
    // that many bytes.
    let rc = unsafe { libc::gethostname(buf.as_mut_ptr().cast(), buf.len()) };
    if rc != 0 {
        return None;
    }
    let end = buf.iter().position(|&b| b == 0).unwrap_or(buf.len());
    String::from_utf8(buf[..end].to_vec()).ok()
}

#[cfg(not(unix))]
fn host_name() -> Option<String> {
    std::env::var("COMPUTERNAME").ok()
}

/// A new temporary file name for `path`, in its directory, that
/// [`remove_stale_temps`] recognizes: for writers that stream a file and
/// rename it themselves.
pub fn temp_path(path: &Path) -> PathBuf {
    let dir = parent(path);
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "out".into());
    dir.join(format!(
        ".{name}.tmp-{}-{}-{}",
        host(),
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    ))
}

fn parent(path: &Path) -> &Path {
    match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    }
}

/// Write `parts`, one after the other, to a new temporary file for `path`;
/// on error nothing is left behind.
fn write_temp(path: &Path, parts: &[&[u8]], sync: bool) -> std::io::Result<PathBuf> {
    let tmp = temp_path(path);
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        for bytes in parts {
            f.write_all(bytes)?;
        }
        if sync {
            f.sync_all()?;
        }
        Ok(())
    })();
    match result {
        Ok(()) => Ok(tmp),
        Err(e) => {
            let _ = std::fs::remove_file(&tmp);
            Err(e)
        }
    }
}

fn sync_dir(dir: &Path) {
    if let Ok(d) = std::fs::File::open(dir) {
        // Make renames durable; not all platforms allow this.
        let _ = d.sync_all();
    }
}

fn write_renamed(
    path: &Path,
    parts: &[&[u8]],
    sync: bool,
    sync_parent: bool,
) -> std::io::Result<()> {
    let tmp = write_temp(path, parts, sync)?;
    if let Err(e) = std::fs::rename(&tmp, path) {
        let _ = std::fs::remove_file(&tmp);
        return Err(e);
    }
    if sync_parent {
        sync_dir(parent(path));
    }
    Ok(())
}

/// Write a set of files into `dir` as one unit, `marker` last. Every file
/// is first written in full to a temporary file; if any of those writes
/// fails (a full disk, a read-only directory), the temporary files are
/// removed and `dir` is exactly as it was. Only then is the old `marker`
/// removed, the files renamed into place, and the new `marker` renamed
/// last: a directory whose marker exists holds the complete set it lists,
/// and one without a marker is incomplete (a process was killed while
/// renaming).
pub fn write_group(dir: &Path, files: &[(&str, &[u8])], marker: &str) -> std::io::Result<()> {
    let mut temps: Vec<(PathBuf, PathBuf)> = Vec::with_capacity(files.len());
    for (name, bytes) in files {
        let target = dir.join(name);
        match write_temp(&target, &[bytes], true) {
            Ok(tmp) => temps.push((tmp, target)),
            Err(e) => {
                for (tmp, _) in &temps {
                    let _ = std::fs::remove_file(tmp);
                }
                return Err(e);
            }
        }
    }
    // The marker moves last; put it at the end whatever the order given.
    temps.sort_by_key(|(_, target)| target.file_name().is_some_and(|n| n == marker));
    match std::fs::remove_file(dir.join(marker)) {
        Ok(()) => {}
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {}
        Err(e) => {
            for (tmp, _) in &temps {
                let _ = std::fs::remove_file(tmp);
            }
            return Err(e);
        }
    }
    sync_dir(dir);
    for (k, (tmp, target)) in temps.iter().enumerate() {
        if let Err(e) = std::fs::rename(tmp, target) {
            for (t, _) in &temps[k..] {
                let _ = std::fs::remove_file(t);
            }
            return Err(e);
        }
    }
    sync_dir(dir);
    Ok(())
}

/// The writer of a temporary file name `.NAME.tmp-HOST-PID-N`, if it is one.
pub fn temp_owner(file_name: &str) -> Option<(&str, u32)> {
    if !file_name.starts_with('.') {
        return None;
    }
    let at = file_name.rfind(".tmp-")?;
    let mut parts = file_name[at + 5..].rsplitn(3, '-');
    let _counter: u64 = parts.next()?.parse().ok()?;
    let pid: u32 = parts.next()?.parse().ok()?;
    let host = parts.next()?;
    (!host.is_empty()).then_some((host, pid))
}

/// Whether process `pid` of this machine is still running.
#[cfg(unix)]
fn alive(pid: u32) -> bool {
    let Ok(pid) = libc::pid_t::try_from(pid) else {
        return false;
    };
    // SAFETY: signal 0 only checks that the process exists.
    if unsafe { libc::kill(pid, 0) } == 0 {
        return true;
    }
    // EPERM: it exists but belongs to someone else.
    std::io::Error::last_os_error().raw_os_error() == Some(libc::EPERM)
}

#[cfg(not(unix))]
fn alive(_pid: u32) -> bool {
    true
}

/// Remove the temporary files that writers left in `dir` when they were
/// killed: those of this machine whose process is gone, and any older than
/// [`FOREIGN_TEMP_AGE`]. Files of running writers are kept. Returns how
/// many were removed.
pub fn remove_stale_temps(dir: &Path) -> u64 {
    let Ok(entries) = std::fs::read_dir(dir) else {
        return 0;
    };
    let now = SystemTime::now();
    let mut removed = 0;
    for e in entries.flatten() {
        let name = e.file_name();
        let Some(name) = name.to_str() else {
            continue;
        };
        let Some((h, pid)) = temp_owner(name) else {
            continue;
        };
        let old = e
            .metadata()
            .and_then(|m| m.modified())
            .ok()
            .and_then(|t| now.duration_since(t).ok())
            .is_some_and(|age| age > FOREIGN_TEMP_AGE);
        let dead_here = h == host() && pid != std::process::id() && !alive(pid);
        if (dead_here || old) && std::fs::remove_file(e.path()).is_ok() {
            removed += 1;
        }
    }
    removed
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn temp_names_carry_their_writer() {
        let t = temp_path(Path::new("out/series.csv"));
        let name = t.file_name().unwrap().to_str().unwrap().to_owned();
        assert!(name.starts_with(".series.csv.tmp-"), "{name}");
        assert_eq!(temp_owner(&name), Some((host(), std::process::id())));
        assert_eq!(temp_owner("series.csv"), None);
        assert_eq!(temp_owner(".series.csv.tmp-x"), None);
        assert_eq!(temp_owner(".a-b.tmp-my_host-12-3"), Some(("my_host", 12)));
    }

    #[test]
    fn stale_temps_of_dead_writers_are_removed_and_live_ones_kept() {
        let dir = tempfile::tempdir().unwrap();
        // A process that has surely exited: a child we waited for.
        let mut child = std::process::Command::new("true").spawn().unwrap();
        let dead = child.id();
        child.wait().unwrap();
        let dead_name = format!(".x.csv.tmp-{}-{dead}-0", host());
        let live_name = format!(".x.csv.tmp-{}-{}-0", host(), std::process::id());
        let foreign = ".x.csv.tmp-elsewhere-1-0";
        for n in [dead_name.as_str(), live_name.as_str(), foreign, "x.csv"] {
            std::fs::write(dir.path().join(n), b"partial").unwrap();
        }
        assert_eq!(remove_stale_temps(dir.path()), 1);
        assert!(!dir.path().join(&dead_name).exists());
        assert!(dir.path().join(&live_name).exists());
        // Another machine's file is kept until it is old.
        assert!(dir.path().join(foreign).exists());
        assert!(dir.path().join("x.csv").exists());
    }

    #[test]
    fn a_group_is_all_or_nothing_and_the_marker_moves_last() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        write_group(
            d,
            &[("m.json", b"1"), ("a.csv", b"a1"), ("b.csv", b"b1")],
            "m.json",
        )
        .unwrap();
        assert_eq!(std::fs::read(d.join("m.json")).unwrap(), b"1");
        // A target that cannot be replaced (a directory of that name) fails
        // the group; the temporary files are gone.
        std::fs::create_dir(d.join("c.csv")).unwrap();
        let err = write_group(
            d,
            &[("a.csv", b"a2"), ("c.csv", b"c2"), ("m.json", b"2")],
            "m.json",
        );
        assert!(err.is_err());
        let names: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert!(names.iter().all(|n| !n.contains(".tmp-")), "{names:?}");
        // The old marker is gone: the set is known to be incomplete.
        assert!(!d.join("m.json").exists());
    }

    #[test]
    fn a_group_that_cannot_be_written_leaves_the_old_set_intact() {
        let dir = tempfile::tempdir().unwrap();
        let d = dir.path();
        write_group(d, &[("a.csv", b"a1"), ("m.json", b"1")], "m.json").unwrap();
        // The second file cannot even be created (as on a full disk): the
        // first one's temporary file is removed and nothing is renamed.
        let err = write_group(
            d,
            &[("a.csv", b"a2"), ("b\0.csv", b"b2"), ("m.json", b"2")],
            "m.json",
        );
        assert!(err.is_err());
        assert_eq!(std::fs::read(d.join("a.csv")).unwrap(), b"a1");
        assert_eq!(std::fs::read(d.join("m.json")).unwrap(), b"1");
        let names: Vec<String> = std::fs::read_dir(d)
            .unwrap()
            .map(|e| e.unwrap().file_name().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names.len(), 2, "{names:?}");
    }
}
