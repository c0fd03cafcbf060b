//! The stage cache's store: content-addressed entries on disk.
//!
//! Invariant: the store keeps and verifies bytes; it never interprets them.
//! What a key means and what a payload holds is decided by the pipeline.
//!
//! Layout: `DIR/v2/ab/abcdef…` (the key's hex, fanned out by its first byte).
//! An entry is `MAGIC`, the 32-byte key, the payload length (u64 LE), the
//! payload, and a checksum of key and payload (XXH3, 128 bits, little-endian).
//! Keys are blake3 content hashes; the checksum only has to catch damage
//! (a flipped bit, a torn or truncated file), and XXH3 does that about five
//! times faster than blake3, which matters because every read verifies the
//! whole entry. Entries of older layouts (`v1`, blake3 checksums) are never
//! read; `hadal cache gc` removes them. Entries are written to a
//! temporary file, flushed, and renamed into place, so a reader sees a whole
//! entry or none; processes sharing the directory (also over a network file
//! system) need no lock: two writers of one key write identical bytes.

use std::path::{Path, PathBuf};
use std::time::{Duration, SystemTime};

const MAGIC: &[u8; 8] = b"HADALC2\n";
const LAYOUT: &str = "v2";
/// Bytes of an entry's checksum.
const CHECKSUM: usize = 16;
/// Largest entry written or read, bytes. An entry is read whole into
/// memory before its checksum is known, so a damaged or planted file may
/// cost at most this much; a stage whose results are larger is recomputed
/// instead of cached.
pub const MAX_ENTRY_BYTES: u64 = 1024 * 1024 * 1024;

pub type Key = [u8; 32];

pub fn key_hex(k: &Key) -> String {
    let mut out = Vec::with_capacity(64);
    push_hex(&mut out, k);
    String::from_utf8(out).unwrap_or_default()
}

/// Lower-case hex of the big-endian bytes of `v` (16 digits), appended to
/// `out`: the same text as [`push_hex`] of `v.to_be_bytes()`, built in a
/// register (fingerprints hold one of these for every report age).
pub fn push_hex_u64(out: &mut Vec<u8>, v: u64) {
    let mut text = [0u8; 16];
    for (i, d) in text.iter_mut().enumerate() {
        *d = DIGITS[((v >> (60 - 4 * i)) & 15) as usize];
    }
    out.extend_from_slice(&text);
}

const DIGITS: &[u8; 16] = b"0123456789abcdef";

/// Lower-case hex of `bytes`, appended to `out`.
pub fn push_hex(out: &mut Vec<u8>, bytes: &[u8]) {
    for b in bytes {
        out.extend_from_slice(&[DIGITS[usize::from(b >> 4)], DIGITS[usize::from(b & 15)]]);
    }
}

#[derive(Debug, Clone)]
pub struct Store {
    root: PathBuf,
}

/// A read that found an entry but could not trust it.
#[derive(Debug, Clone, PartialEq)]
pub struct Corrupt {
    pub path: PathBuf,
    pub why: Damage,
}

/// What is wrong with a cache entry; its words complete "corrupt: FILE: ".
#[derive(Debug, Clone, PartialEq)]
pub enum Damage {
    /// Not a regular file, a link, or unreadable (the reader's words).
    Unreadable(String),
    /// Longer than [`MAX_ENTRY_BYTES`].
    TooLarge {
        len: u64,
    },
    /// Shorter than a header and a checksum.
    Truncated {
        len: usize,
    },
    /// A length other than the one its header records (`None`: a header
    /// claiming more than 2^64 bytes).
    LengthMismatch {
        len: u64,
        want: Option<u64>,
    },
    BadMagic,
    KeyMismatch,
    NameNotKey,
    Checksum,
    /// Checked bytes whose payload its reader does not understand.
    Payload(&'static str),
}

impl std::fmt::Display for Damage {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Damage::Unreadable(why) => f.write_str(why),
            Damage::TooLarge { len } => write!(
                f,
                "is {len} bytes, more than the limit of {MAX_ENTRY_BYTES} bytes"
            ),
            Damage::Truncated { len } => write!(f, "truncated ({len} bytes)"),
            Damage::LengthMismatch { len, want } => match want {
                Some(w) => write!(f, "truncated or padded: {len} bytes, expected {w}"),
                None => write!(
                    f,
                    "truncated or padded: {len} bytes, expected more than 2^64"
                ),
            },
            Damage::BadMagic => f.write_str("not a hadal cache entry (bad magic)"),
            Damage::KeyMismatch => f.write_str("the entry's key does not match its file name"),
            Damage::NameNotKey => f.write_str("the file name is not a key"),
            Damage::Checksum => f.write_str("checksum mismatch (the entry was altered)"),
            Damage::Payload(why) => f.write_str(why),
        }
    }
}

/// A cache folder that is not one (a file, or a path under a file).
#[derive(Debug, Clone, PartialEq)]
pub struct NotADirectory(pub PathBuf);

impl std::fmt::Display for NotADirectory {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "the cache {} is not a directory", self.0.display())
    }
}

#[derive(Debug, Clone, Default, PartialEq)]
pub struct Stats {
    pub entries: u64,
    pub bytes: u64,
    pub oldest: Option<SystemTime>,
    pub newest: Option<SystemTime>,
}

impl Store {
    /// The store under `root` (created on first write).
    pub fn new(root: impl Into<PathBuf>) -> Store {
        Store { root: root.into() }
    }

    /// `HADAL_CACHE` if set, else `.hadal-cache` in the current directory.
    pub fn default_location() -> PathBuf {
        match std::env::var_os("HADAL_CACHE") {
            Some(v) if !v.is_empty() => PathBuf::from(v),
            _ => PathBuf::from(".hadal-cache"),
        }
    }

    pub fn root(&self) -> &Path {
        &self.root
    }

    /// Whether the store's folder can be one: absent (it is created on
    /// first write) or a directory. A file there is an I/O problem to
    /// report up front, not an entry that could not be read.
    pub fn check_root(&self) -> Result<(), NotADirectory> {
        let bad = || NotADirectory(self.root.clone());
        match std::fs::metadata(&self.root) {
            Ok(m) if m.is_dir() => Ok(()),
            Ok(_) => Err(bad()),
            Err(e) if e.kind() == std::io::ErrorKind::NotADirectory => Err(bad()),
            Err(_) => Ok(()),
        }
    }

    /// Where the entry of `key` lives (present or not).
    pub fn path(&self, key: &Key) -> PathBuf {
        let hex = key_hex(key);
        self.root.join(LAYOUT).join(&hex[..2]).join(hex)
    }

    /// The payload stored under `key`: `Ok(None)` when absent, `Err` when
    /// present but corrupt (the entry is then removed, so the caller
    /// recomputes and writes it afresh).
    pub fn get(&self, key: &Key) -> Result<Option<Vec<u8>>, Corrupt> {
        let mut out = Vec::new();
        Ok(self.get_into(key, &mut out)?.then_some(out))
    }

    /// Like [`Store::get`], appending the payload to `out` (read in place,
    /// without an intermediate buffer); `Ok(false)` when absent. On any
    /// error `out` is left as it was.
    pub fn get_into(&self, key: &Key, out: &mut Vec<u8>) -> Result<bool, Corrupt> {
        let path = self.path(key);
        let base = out.len();
        let file = match read_entry(&path, out) {
            Ok(Some(f)) => f,
            Ok(None) => return Ok(false),
            Err(why) => {
                out.truncate(base);
                let _ = std::fs::remove_file(&path);
                return Err(Corrupt { path, why });
            }
        };
        match decode(&out[base..], Some(key)).map(|p| p.len()) {
            Ok(len) => {
                // Mark as recently used, for `gc --max-size`, through the
                // open file (it fails harmlessly where we are not the
                // owner); at most once a minute per entry.
                let now = SystemTime::now();
                let stale = file
                    .metadata()
                    .ok()
                    .and_then(|m| m.modified().ok())
                    .and_then(|t| now.duration_since(t).ok())
                    .is_none_or(|age| age > Duration::from_secs(60));
                if stale {
                    let _ = file.set_modified(now);
                }
                let start = base + HEADER;
                out.copy_within(start..start + len, base);
                out.truncate(base + len);
                Ok(true)
            }
            Err(why) => {
                out.truncate(base);
                drop(file);
                let _ = std::fs::remove_file(&path);
                Err(Corrupt { path, why })
            }
        }
    }

    /// Store `payload` under `key`, atomically.
    pub fn put(&self, key: &Key, payload: &[u8]) -> std::io::Result<()> {
        let path = self.path(key);
        let total = (payload.len() as u64).saturating_add((HEADER + CHECKSUM) as u64);
        if total > MAX_ENTRY_BYTES {
            return Err(std::io::Error::other(format!(
                "an entry of {total} bytes is more than the limit of {MAX_ENTRY_BYTES} bytes"
            )));
        }
        if let Some(dir) = path.parent() {
            std::fs::create_dir_all(dir)?;
        }
        // Head, payload and checksum written in turn: the payload (a
        // stage's rows, its part of the series) is not copied.
        let mut head = Vec::with_capacity(80);
        head.extend_from_slice(MAGIC);
        head.extend_from_slice(key);
        head.extend_from_slice(&(payload.len() as u64).to_le_bytes());
        let sum = entry_checksum(key, payload);
        crate::fsutil::write_atomic_entry_parts(&path, &[&head, payload, &sum])
    }

    fn entries(&self) -> Vec<PathBuf> {
        let mut out: Vec<PathBuf> = fanned_files(&self.root.join(LAYOUT))
            .into_iter()
            // Temporary files of writes in progress start with a dot.
            .filter(|p| {
                p.file_name()
                    .is_some_and(|n| !n.to_string_lossy().starts_with('.'))
            })
            .collect();
        out.sort();
        out
    }

    pub fn stats(&self) -> Stats {
        let mut s = Stats::default();
        for p in self.entries() {
            if let Ok(m) = std::fs::metadata(&p) {
                s.entries += 1;
                s.bytes += m.len();
                if let Ok(t) = m.modified() {
                    s.oldest = Some(s.oldest.map_or(t, |o| o.min(t)));
                    s.newest = Some(s.newest.map_or(t, |o| o.max(t)));
                }
            }
        }
        s
    }

    /// Check every entry; returns the number checked and the bad ones.
    pub fn verify(&self) -> (u64, Vec<Corrupt>) {
        let mut bad = Vec::new();
        let mut n = 0;
        for p in self.entries() {
            n += 1;
            let name = p
                .file_name()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            let expected = parse_hex(&name);
            let mut bytes = Vec::new();
            match read_entry(&p, &mut bytes) {
                Ok(None) => n -= 1, // removed since it was listed
                Ok(Some(_)) => {
                    if let Err(why) = decode(&bytes, expected.as_ref()) {
                        bad.push(Corrupt { path: p, why });
                    } else if expected.is_none() {
                        bad.push(Corrupt {
                            path: p,
                            why: Damage::NameNotKey,
                        });
                    }
                }
                Err(why) => bad.push(Corrupt { path: p, why }),
            }
        }
        (n, bad)
    }

    /// Remove the temporary files of writers that were killed (see
    /// [`crate::fsutil::remove_stale_temps`]) from every folder of the
    /// store. Returns how many were removed.
    pub fn remove_stale_temps(&self) -> u64 {
        let mut removed = crate::fsutil::remove_stale_temps(&self.root);
        for sub in [self.root.join(LAYOUT), self.root.join("traces")] {
            removed += crate::fsutil::remove_stale_temps(&sub);
            if let Ok(dirs) = std::fs::read_dir(&sub) {
                for d in dirs.flatten() {
                    if d.file_type().is_ok_and(|t| t.is_dir()) {
                        removed += crate::fsutil::remove_stale_temps(&d.path());
                    }
                }
            }
        }
        removed
    }

    /// Remove the folders of older layouts (`v1`, ...) and what they hold.
    /// Returns (removed files, freed bytes).
    fn remove_old_layouts(&self) -> (u64, u64) {
        let (mut removed, mut freed) = (0, 0);
        for d in std::fs::read_dir(&self.root)
            .into_iter()
            .flatten()
            .flatten()
        {
            let name = d.file_name();
            let name = name.to_string_lossy();
            let is_layout = name.len() > 1
                && name.starts_with('v')
                && name[1..].bytes().all(|b| b.is_ascii_digit());
            if !is_layout || name == LAYOUT || !d.file_type().is_ok_and(|t| t.is_dir()) {
                continue;
            }
            for f in fanned_files(&d.path()) {
                let len = f.metadata().map_or(0, |m| m.len());
                if std::fs::remove_file(&f).is_ok() {
                    removed += 1;
                    freed += len;
                }
            }
            for fan in std::fs::read_dir(d.path()).into_iter().flatten().flatten() {
                let _ = std::fs::remove_dir(fan.path());
            }
            let _ = std::fs::remove_dir(d.path());
        }
        (removed, freed)
    }

    /// Remove entries unused for longer than `older_than`, then the least
    /// recently used until the store is at most `max_size` bytes. Returns
    /// (removed entries, freed bytes).
    /// Entries of older layouts are removed whatever the limits: no version
    /// of hadal that reads this store can read them.
    pub fn gc(&self, older_than: Option<Duration>, max_size: Option<u64>) -> (u64, u64) {
        let (mut removed, mut freed) = self.remove_old_layouts();
        let now = SystemTime::now();
        let mut items: Vec<(SystemTime, u64, PathBuf)> = self
            .entries()
            .into_iter()
            .filter_map(|p| {
                let m = std::fs::metadata(&p).ok()?;
                Some((m.modified().unwrap_or(now), m.len(), p))
            })
            .collect();
        items.sort();
        let mut keep = Vec::new();
        for (t, len, p) in items {
            let old = older_than.is_some_and(|d| now.duration_since(t).unwrap_or_default() > d);
            if old && std::fs::remove_file(&p).is_ok() {
                removed += 1;
                freed += len;
            } else {
                keep.push((t, len, p));
            }
        }
        if let Some(max) = max_size {
            let mut total: u64 = keep.iter().fold(0u64, |t, k| t.saturating_add(k.1));
            for (_, len, p) in &keep {
                if total <= max {
                    break;
                }
                if std::fs::remove_file(p).is_ok() {
                    removed += 1;
                    freed += len;
                    total = total.saturating_sub(*len);
                }
            }
        }
        (removed, freed)
    }
}

/// Every file in the fan-out folders of `base` (`base/ab/...`), unsorted.
fn fanned_files(base: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    for d in std::fs::read_dir(base).into_iter().flatten().flatten() {
        for f in std::fs::read_dir(d.path()).into_iter().flatten().flatten() {
            out.push(f.path());
        }
    }
    out
}

fn parse_hex(s: &str) -> Option<Key> {
    if s.len() != 64 {
        return None;
    }
    let mut k = [0u8; 32];
    for (i, b) in k.iter_mut().enumerate() {
        *b = u8::from_str_radix(s.get(2 * i..2 * i + 2)?, 16).ok()?;
    }
    Some(k)
}

/// The checksum of an entry: XXH3-128 of key and payload.
fn entry_checksum(key: &[u8], payload: &[u8]) -> [u8; CHECKSUM] {
    let mut h = xxhash_rust::xxh3::Xxh3::new();
    h.update(key);
    h.update(payload);
    h.digest128().to_le_bytes()
}

/// Magic, key and payload length.
const HEADER: usize = MAGIC.len() + 32 + 8;

/// The length an entry must have, from its header; `None` when the
/// recorded payload length cannot be (it overflows).
fn entry_len(header: &[u8]) -> Option<u64> {
    let mut len = [0u8; 8];
    len.copy_from_slice(header.get(MAGIC.len() + 32..HEADER)?);
    u64::from_le_bytes(len).checked_add((HEADER + CHECKSUM) as u64)
}

/// Append the bytes of the entry file at `path` to `out`; `Ok(None)` when
/// there is none, else the open file (to mark it used). Only a regular
/// file is opened, never through a symbolic link (a link to a device
/// would be read forever), and a file whose length differs from the one
/// its header records is refused before its payload is read.
fn read_entry(path: &Path, out: &mut Vec<u8>) -> Result<Option<std::fs::File>, Damage> {
    use std::io::Read;
    let unreadable = |e: &dyn std::fmt::Display| Damage::Unreadable(e.to_string());
    let (file, len) = match crate::fsutil::open_regular(path, false) {
        Ok(f) => f,
        Err(e) if e.is_not_found() => return Ok(None),
        Err(e) => return Err(unreadable(&e)),
    };
    if len > MAX_ENTRY_BYTES {
        return Err(Damage::TooLarge { len });
    }
    let base = out.len();
    let mut reader = (&file).take(HEADER as u64);
    reader.read_to_end(out).map_err(|e| unreadable(&e))?;
    if out.len() - base == HEADER && out[base..base + MAGIC.len()] == MAGIC[..] {
        match entry_len(&out[base..]) {
            Some(want) if want == len => {}
            want => return Err(Damage::LengthMismatch { len, want }),
        }
    }
    out.reserve(usize::try_from(len).unwrap_or(0).saturating_sub(HEADER));
    // The length may change while reading: never read more than it said.
    let rest = len.saturating_sub((out.len() - base) as u64);
    (&file)
        .take(rest.saturating_add(1))
        .read_to_end(out)
        .map_err(|e| unreadable(&e))?;
    Ok(Some(file))
}

fn decode<'a>(bytes: &'a [u8], key: Option<&Key>) -> Result<&'a [u8], Damage> {
    let header = HEADER;
    if bytes.len() < header + CHECKSUM {
        return Err(Damage::Truncated { len: bytes.len() });
    }
    if &bytes[..MAGIC.len()] != MAGIC {
        return Err(Damage::BadMagic);
    }
    let stored_key: &[u8] = &bytes[MAGIC.len()..MAGIC.len() + 32];
    if let Some(k) = key {
        if stored_key != k {
            return Err(Damage::KeyMismatch);
        }
    }
    let want = entry_len(bytes);
    if want != Some(bytes.len() as u64) {
        return Err(Damage::LengthMismatch {
            len: bytes.len() as u64,
            want,
        });
    }
    let len = bytes.len() - header - CHECKSUM;
    let payload = &bytes[header..header + len];
    if entry_checksum(stored_key, payload) != bytes[header + len..] {
        return Err(Damage::Checksum);
    }
    Ok(payload)
}

/// Parse a duration such as `30d`, `12h`, `90m`, `45s`, `2w`. `None` for
/// anything else, including a negative, non-finite or too long duration
/// (more than `u64::MAX` seconds).
pub fn parse_duration(s: &str) -> Option<Duration> {
    let s = s.trim();
    let (num, unit) = s.split_at(s.find(|c: char| !c.is_ascii_digit() && c != '.')?);
    let n: f64 = num.parse().ok()?;
    let secs = match unit {
        "s" => 1.0,
        "m" | "min" => 60.0,
        "h" => 3600.0,
        "d" => 86400.0,
        "w" => 7.0 * 86400.0,
        _ => return None,
    };
    // `from_secs_f64` panics past its range; the checked form does not.
    Duration::try_from_secs_f64(n * secs).ok()
}

/// Parse a size such as `500M`, `2G`, `100k`, `1234` (bytes). `None` for
/// anything else, including a size past `u64::MAX` bytes.
pub fn parse_size(s: &str) -> Option<u64> {
    let s = s.trim();
    let split = s
        .find(|c: char| !c.is_ascii_digit() && c != '.')
        .unwrap_or(s.len());
    let (num, unit) = s.split_at(split);
    let n: f64 = num.parse().ok()?;
    let mul = match unit.trim_end_matches(['B', 'b']) {
        "" => 1.0,
        "k" | "K" => 1024.0,
        "M" => 1024.0 * 1024.0,
        "G" => 1024.0 * 1024.0 * 1024.0,
        _ => return None,
    };
    let bytes = n * mul;
    // 2^64 is the first value that does not fit (an `as` cast would
    // silently saturate).
    (0.0..18_446_744_073_709_551_616.0)
        .contains(&bytes)
        .then_some(bytes as u64)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn roundtrip_and_corruption_is_detected() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = *blake3::hash(b"k").as_bytes();
        assert_eq!(store.get(&key), Ok(None));
        store.put(&key, b"payload bytes").unwrap();
        assert_eq!(store.get(&key).unwrap().unwrap(), b"payload bytes");
        // Flip one payload byte.
        let path = store.path(&key);
        let mut bytes = std::fs::read(&path).unwrap();
        let i = MAGIC.len() + 32 + 8 + 3;
        bytes[i] ^= 0x20;
        std::fs::write(&path, &bytes).unwrap();
        let (n, bad) = store.verify();
        assert_eq!((n, bad.len()), (1, 1));
        let err = store.get(&key).unwrap_err();
        assert!(err.why.to_string().contains("checksum"), "{}", err.why);
        // A corrupt entry is removed on read.
        assert_eq!(store.get(&key), Ok(None));
        // Truncation too.
        store.put(&key, b"payload bytes").unwrap();
        let bytes = std::fs::read(&path).unwrap();
        std::fs::write(&path, &bytes[..bytes.len() - 5]).unwrap();
        assert!(store
            .get(&key)
            .unwrap_err()
            .why
            .to_string()
            .contains("truncated"));
    }

    #[test]
    fn a_header_claiming_an_impossible_length_is_corrupt_not_a_panic() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = *blake3::hash(b"k").as_bytes();
        for claimed in [u64::MAX, u64::MAX - 40, 1 << 40] {
            let mut bytes = MAGIC.to_vec();
            bytes.extend_from_slice(&key);
            bytes.extend_from_slice(&claimed.to_le_bytes());
            bytes.extend_from_slice(&[0u8; CHECKSUM]);
            assert!(decode(&bytes, Some(&key))
                .unwrap_err()
                .to_string()
                .starts_with("truncated or padded"));
            let path = store.path(&key);
            std::fs::create_dir_all(path.parent().unwrap()).unwrap();
            std::fs::write(&path, &bytes).unwrap();
            let err = store.get(&key).unwrap_err();
            assert!(
                err.why.to_string().starts_with("truncated or padded"),
                "{}",
                err.why
            );
            assert!(!path.exists(), "a corrupt entry is removed");
        }
    }

    #[cfg(unix)]
    #[test]
    fn entries_that_are_links_or_not_files_are_corrupt() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = *blake3::hash(b"k").as_bytes();
        store.put(&key, b"payload").unwrap();
        let path = store.path(&key);
        let kept = dir.path().join("kept");
        std::fs::rename(&path, &kept).unwrap();
        std::os::unix::fs::symlink(&kept, &path).unwrap();
        let (n, bad) = store.verify();
        assert_eq!((n, bad.len()), (1, 1));
        assert_eq!(bad[0].why.to_string(), "is a symbolic link, not a file");
        assert_eq!(store.get(&key).unwrap_err().why, bad[0].why);
        assert_eq!(store.get(&key), Ok(None), "the link was removed");
        assert!(kept.exists(), "not what it pointed to");
        // A folder that is a file.
        let file = dir.path().join("file");
        std::fs::write(&file, b"x").unwrap();
        assert!(Store::new(&file).check_root().is_err());
        assert!(Store::new(file.join("sub")).check_root().is_err());
        assert!(Store::new(dir.path().join("absent")).check_root().is_ok());
        assert!(store.check_root().is_ok());
    }

    #[test]
    fn hex_of_a_u64_is_the_hex_of_its_big_endian_bytes() {
        for v in [
            0,
            1,
            0xfe,
            u64::MAX,
            0x0123_4567_89ab_cdef,
            1e9f64.to_bits(),
        ] {
            let (mut a, mut b) = (Vec::new(), Vec::new());
            push_hex_u64(&mut a, v);
            push_hex(&mut b, &v.to_be_bytes());
            assert_eq!(a, b);
            assert_eq!(String::from_utf8(a).unwrap(), format!("{v:016x}"));
        }
    }

    #[test]
    fn every_flipped_bit_and_every_cut_is_detected() {
        let key = *blake3::hash(b"entry").as_bytes();
        let payload: Vec<u8> = (0..200u8).collect();
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        store.put(&key, &payload).unwrap();
        let bytes = std::fs::read(store.path(&key)).unwrap();
        assert_eq!(bytes.len(), HEADER + payload.len() + CHECKSUM);
        assert_eq!(decode(&bytes, Some(&key)), Ok(&payload[..]));
        let mut altered = bytes.clone();
        for i in 0..bytes.len() {
            for bit in 0..8 {
                altered[i] ^= 1 << bit;
                assert!(decode(&altered, Some(&key)).is_err(), "byte {i} bit {bit}");
                altered[i] = bytes[i];
            }
        }
        for cut in 0..bytes.len() {
            assert!(decode(&bytes[..cut], Some(&key)).is_err(), "cut at {cut}");
        }
    }

    #[test]
    fn gc_removes_entries_of_older_layouts_and_keeps_current_ones() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        let key = *blake3::hash(b"k").as_bytes();
        store.put(&key, b"current").unwrap();
        let old = dir.path().join("v1").join("ab");
        std::fs::create_dir_all(&old).unwrap();
        std::fs::write(old.join("ab00"), [0u8; 100]).unwrap();
        std::fs::create_dir_all(dir.path().join("vx")).unwrap();
        assert_eq!(store.gc(None, None), (1, 100));
        assert!(!dir.path().join("v1").exists());
        assert!(dir.path().join("vx").exists(), "not a layout folder");
        assert_eq!(store.get(&key).unwrap().unwrap(), b"current");
    }

    #[test]
    fn gc_by_size_and_stats() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::new(dir.path());
        for i in 0..5u8 {
            store.put(blake3::hash(&[i]).as_bytes(), &[i; 100]).unwrap();
        }
        let s = store.stats();
        assert_eq!(s.entries, 5);
        let each = s.bytes / 5;
        let (removed, _) = store.gc(None, Some(each * 2));
        assert_eq!(removed, 3);
        assert_eq!(store.stats().entries, 2);
        let (removed, _) = store.gc(Some(Duration::from_secs(0)), None);
        assert_eq!(removed, 2);
    }

    #[test]
    fn durations_and_sizes() {
        assert_eq!(parse_duration("30d"), Some(Duration::from_secs(30 * 86400)));
        assert_eq!(parse_duration("2h"), Some(Duration::from_secs(7200)));
        assert_eq!(parse_duration("x"), None);
        assert_eq!(parse_size("500M"), Some(500 * 1024 * 1024));
        assert_eq!(parse_size("1234"), Some(1234));
        assert_eq!(parse_size("3Q"), None);
        // Past the range: refused, never a panic or a silent saturation.
        assert_eq!(parse_duration("18446744073709551615s"), None);
        assert_eq!(parse_duration("99999999999999999999w"), None);
        assert_eq!(parse_duration("0s"), Some(Duration::ZERO));
        for bad in [
            "", "-1d", "d", ".d", "1..2d", "inf", "NaNs", "1e3s", "３d", "1 d",
        ] {
            assert_eq!(parse_duration(bad), None, "{bad:?}");
        }
        assert_eq!(parse_size("18446744073709551615"), None);
        assert_eq!(parse_size("99999999999G"), None);
        assert_eq!(parse_size("0"), Some(0));
        for bad in ["", "-1M", "M", "inf", "NaN", "1e3", "５M"] {
            assert_eq!(parse_size(bad), None, "{bad:?}");
        }
    }
}
