//! Writing files so that a reader never sees half of one.
//!
//! Every file is written to a temporary file beside it, named
//! `.NAME.tmp-HOST-PID-N`, flushed, and renamed over the target. A process
//! killed mid-write leaves only such a temporary file, never a half-written
//! target; [`remove_stale_temps`] clears them (the next `hadal run` does so
//! in its output directory, `hadal cache gc` in the cache).
//!
//! Every file is read through [`read_bounded`] (or [`open_regular`]): only
//! regular files, never more than a stated number of bytes, so a pipe, a
//! device or a huge file can neither hang a process nor exhaust memory.

use std::io::{Read, Write};
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

/// Largest output file of a run or an ensemble (`series.csv`,
/// `members.csv`, ...) read back whole by `diff`, `plot` and `report`:
/// they parse it into memory, at several times its size.
pub const MAX_OUTPUT_BYTES: u64 = 256 * 1024 * 1024;
/// Largest JSON file read back (`summary.json`, `manifest.json`) and
/// largest hint file of the cache.
pub const MAX_JSON_BYTES: u64 = 64 * 1024 * 1024;

/// Why a file could not be read by [`read_bounded`] or [`open_regular`].
#[derive(Debug)]
pub enum ReadError {
    /// A directory where a file was expected.
    Directory,
    /// A pipe, a device or a socket: reading one may block forever or
    /// never end, so it is refused before any byte is read.
    NotRegular,
    /// A symbolic link where the caller accepts none (cache entries).
    Symlink,
    /// More bytes than the limit: `len` is the file's length, `None` when it
    /// grew past the limit while being read.
    TooLarge {
        len: Option<u64>,
        limit: u64,
    },
    Io(std::io::Error),
}

impl ReadError {
    pub fn is_not_found(&self) -> bool {
        matches!(self, ReadError::Io(e) if e.kind() == std::io::ErrorKind::NotFound)
    }
}

impl std::fmt::Display for ReadError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ReadError::Directory => f.write_str("is a directory, not a file"),
            ReadError::NotRegular => f.write_str("is not a regular file (a pipe or a device)"),
            ReadError::Symlink => f.write_str("is a symbolic link, not a file"),
            ReadError::TooLarge {
                len: Some(n),
                limit,
            } => write!(f, "is {n} bytes, more than the limit of {limit} bytes"),
            ReadError::TooLarge { len: None, limit } => {
                write!(f, "is more than the limit of {limit} bytes")
            }
            ReadError::Io(e) => f.write_str(&io_words(e)),
        }
    }
}

impl std::error::Error for ReadError {}

/// Plain words for an I/O error.
pub fn io_words(e: &std::io::Error) -> String {
    match e.kind() {
        std::io::ErrorKind::NotFound => "no such file".into(),
        std::io::ErrorKind::PermissionDenied => "permission denied".into(),
        _ => e.to_string(),
    }
}

fn kind_error(t: std::fs::FileType) -> Option<ReadError> {
    if t.is_file() {
        None
    } else if t.is_dir() {
        Some(ReadError::Directory)
    } else if t.is_symlink() {
        Some(ReadError::Symlink)
    } else {
        Some(ReadError::NotRegular)
    }
}

/// Open `path` for reading only if it is a regular file; returns the file
/// and its length. With `follow` false a symbolic link is refused too.
///
/// The type is checked before opening (opening a pipe with no writer
/// blocks), and again on the open file: on unix the file is opened with
/// `O_NONBLOCK` (and `O_NOFOLLOW` when not following), so a file swapped
/// for a pipe between the two checks is still never waited on.
pub fn open_regular(path: &Path, follow: bool) -> Result<(std::fs::File, u64), ReadError> {
    let meta = if follow {
        std::fs::metadata(path)
    } else {
        std::fs::symlink_metadata(path)
    }
    .map_err(ReadError::Io)?;
    if let Some(e) = kind_error(meta.file_type()) {
        return Err(e);
    }
    let file = open_nonblocking(path, follow)?;
    let meta = file.metadata().map_err(ReadError::Io)?;
    if let Some(e) = kind_error(meta.file_type()) {
        return Err(e);
    }
    Ok((file, meta.len()))
}

#[cfg(unix)]
fn open_nonblocking(path: &Path, follow: bool) -> Result<std::fs::File, ReadError> {
    use std::os::unix::fs::OpenOptionsExt;
    let mut flags = libc::O_NONBLOCK;
    if !follow {
        flags |= libc::O_NOFOLLOW;
    }
    std::fs::OpenOptions::new()
        .read(true)
        .custom_flags(flags)
        .open(path)
        .map_err(|e| {
            if !follow && e.raw_os_error() == Some(libc::ELOOP) {
                ReadError::Symlink
            } else {
                ReadError::Io(e)
            }
        })
}

#[cfg(not(unix))]
fn open_nonblocking(path: &Path, _follow: bool) -> Result<std::fs::File, ReadError> {
    std::fs::File::open(path).map_err(ReadError::Io)
}

/// Read all of `file` (of length `len` when opened), at most `limit`
/// bytes: a file longer than that, or one that grows past it while being
/// read, is refused.
pub fn read_to_limit(file: std::fs::File, len: u64, limit: u64) -> Result<Vec<u8>, ReadError> {
    if len > limit {
        return Err(ReadError::TooLarge {
            len: Some(len),
            limit,
        });
    }
    let mut bytes = Vec::with_capacity(usize::try_from(len).unwrap_or(0));
    file.take(limit.saturating_add(1))
        .read_to_end(&mut bytes)
        .map_err(ReadError::Io)?;
    if bytes.len() as u64 > limit {
        return Err(ReadError::TooLarge { len: None, limit });
    }
    Ok(bytes)
}

/// The bytes of the regular file at `path` (symbolic links followed), at
/// most `limit` of them; see [`open_regular`] and [`read_to_limit`].
pub fn read_bounded(path: &Path, limit: u64) -> Result<Vec<u8>, ReadError> {
    let (file, len) = open_regular(path, true)?;
    read_to_limit(file, len, limit)
}

/// Copy the regular file `from` to `to` atomically (see [`write_atomic`]),
/// streaming: memory does not depend on the file's size.
pub fn copy_atomic(from: &Path, to: &Path) -> Result<(), CopyError> {
    let (mut src, _) = open_regular(from, true).map_err(|error| CopyError::Read {
        path: from.to_owned(),
        error,
    })?;
    let tmp = temp_path(to);
    let result = (|| {
        let mut dst = std::fs::File::create(&tmp)?;
        std::io::copy(&mut src, &mut dst)?;
        dst.sync_all()?;
        std::fs::rename(&tmp, to)
    })();
    result.map_err(|error| {
        let _ = std::fs::remove_file(&tmp);
        CopyError::Write {
            path: to.to_owned(),
            error,
        }
    })
}

/// Why [`copy_atomic`] failed: its source could not be read, or its
/// target written.
#[derive(Debug)]
pub enum CopyError {
    Read {
        path: PathBuf,
        error: ReadError,
    },
    Write {
        path: PathBuf,
        error: std::io::Error,
    },
}

impl std::fmt::Display for CopyError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            CopyError::Read { path, error } => write!(f, "{}: {error}", path.display()),
            CopyError::Write { path, error } => {
                write!(f, "cannot write {}: {error}", path.display())
            }
        }
    }
}

impl std::error::Error for CopyError {}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bounded_reads_take_regular_files_up_to_the_limit() {
        let dir = tempfile::tempdir().unwrap();
        let f = dir.path().join("f");
        std::fs::write(&f, b"12345").unwrap();
        assert_eq!(read_bounded(&f, 5).unwrap(), b"12345");
        let e = read_bounded(&f, 4).unwrap_err();
        assert_eq!(e.to_string(), "is 5 bytes, more than the limit of 4 bytes");
        assert!(matches!(
            read_bounded(dir.path(), 10),
            Err(ReadError::Directory)
        ));
        let missing = read_bounded(&dir.path().join("nope"), 10).unwrap_err();
        assert!(missing.is_not_found());
        assert_eq!(missing.to_string(), "no such file");
    }

    #[cfg(unix)]
    #[test]
    fn devices_pipes_and_unwanted_links_are_refused_unread() {
        let dir = tempfile::tempdir().unwrap();
        let fifo = dir.path().join("p");
        let ok = std::process::Command::new("mkfifo")
            .arg(&fifo)
            .status()
            .unwrap()
            .success();
        assert!(ok);
        // Would block forever if it were opened without O_NONBLOCK.
        assert!(matches!(
            read_bounded(&fifo, 10),
            Err(ReadError::NotRegular)
        ));
        assert!(matches!(
            read_bounded(Path::new("/dev/zero"), 10),
            Err(ReadError::NotRegular)
        ));
        let target = dir.path().join("t");
        std::fs::write(&target, b"x").unwrap();
        let link = dir.path().join("l");
        std::os::unix::fs::symlink(&target, &link).unwrap();
        assert_eq!(read_bounded(&link, 10).unwrap(), b"x");
        assert!(matches!(
            open_regular(&link, false),
            Err(ReadError::Symlink)
        ));
        let zero = dir.path().join("z");
        std::os::unix::fs::symlink("/dev/zero", &zero).unwrap();
        assert!(matches!(
            open_regular(&zero, false),
            Err(ReadError::Symlink)
        ));
        assert!(matches!(
            read_bounded(&zero, 10),
            Err(ReadError::NotRegular)
        ));
    }

    #[test]
    fn copies_stream_and_refuse_what_is_not_a_file() {
        let dir = tempfile::tempdir().unwrap();
        let a = dir.path().join("a");
        std::fs::write(&a, vec![7u8; 100_000]).unwrap();
        copy_atomic(&a, &dir.path().join("b")).unwrap();
        assert_eq!(
            std::fs::read(dir.path().join("b")).unwrap(),
            vec![7u8; 100_000]
        );
        assert!(copy_atomic(dir.path(), &dir.path().join("c")).is_err());
        assert!(!dir.path().join("c").exists());
    }

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
