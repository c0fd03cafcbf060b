//! Writing files so that a reader never sees half of one.

use std::io::Write;
use std::path::Path;
use std::sync::atomic::{AtomicU64, Ordering};

static COUNTER: AtomicU64 = AtomicU64::new(0);

/// Write `bytes` to `path` through a temporary file in the same directory,
/// flushed to disk, then renamed over the target. On error the temporary
/// file is removed and the target is untouched.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_renamed(path, bytes, true)
}

/// Like [`write_atomic`] without flushing to disk: a reader still sees a
/// whole file or none, but a power cut may lose it. For hint files only.
pub fn write_atomic_unsynced(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_renamed(path, bytes, false)
}

fn write_renamed(path: &Path, bytes: &[u8], sync: bool) -> std::io::Result<()> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "out".into());
    let tmp = dir.join(format!(
        ".{name}.tmp-{}-{}",
        std::process::id(),
        COUNTER.fetch_add(1, Ordering::Relaxed)
    ));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        if sync {
            f.sync_all()?;
        }
        drop(f);
        std::fs::rename(&tmp, path)?;
        if sync {
            if let Ok(d) = std::fs::File::open(dir) {
                // Make the rename itself durable; not all platforms allow this.
                let _ = d.sync_all();
            }
        }
        Ok(())
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}
