//! The embedded state store: one file per input shard holding the shard's complete state
//! *and* the input offset it reflects, replaced atomically (write to a temporary file, fsync,
//! rename, fsync the directory).
//!
//! Because state and offset are in one file, a crash at any moment leaves either the old or
//! the new pair, never a mix; on restart the consumer seeks each partition to its stored
//! offset and the broker replays the rest. Kafka is the log, so no write-ahead log is needed
//! for Kafka shards.
//!
//! The format is hand-written little-endian binary with a CRC-32 trailer: the bulk of a shard
//! is flat arrays of fixed-width integers (unit hashes and slots), which need no schema
//! machinery, and a hand format keeps the pure core free of serde.

use std::fs::{self, File};
use std::io::{self, Write};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::event::{Event, EventBody, Outcome};
use crate::experiment::{ExperimentDef, ExposureBasis, MetricKind};
use crate::state::image::{ExperimentImage, ExposureRecord, ImageMismatch, UnitRecord};
use crate::state::shards::{Shard, ShardImage};
use crate::state::{ConversionTotals, DefectTotals, MetricTotals, OutcomeCounts};

const MAGIC: &[u8; 8] = b"PSTDSHRD";
/// 4 added the co-partitioned shards' reference-time boundary mark; 3 added each unit's
/// exposure second and the co-partitioned shards' topic offsets, watermarks and held
/// outcomes; versions 2 and 3 are still read (see [`decode`]).
const VERSION: u32 = 4;
/// The version before the boundary mark (read as "no mark": boundaries restart at the
/// first record read after the restore).
const VERSION_WITHOUT_BOUNDARY_MARK: u32 = 3;
/// The previous version, read with no exposure times (units count as exposed since the epoch).
const VERSION_WITHOUT_EXPOSURES: u32 = 2;
const NONE_I64: i64 = i64::MIN;

/// Store failures.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum StoreError {
    /// The file system refused.
    #[error("state store I/O on {path}: {source}")]
    Io {
        /// The file or directory.
        path: PathBuf,
        /// The error.
        source: io::Error,
    },
    /// A stored file is damaged or from an unknown version.
    #[error("stored state {path} is unreadable: {reason}")]
    Corrupt {
        /// The file.
        path: PathBuf,
        /// What is wrong.
        reason: String,
    },
}

/// A directory of shard files.
#[derive(Debug, Clone)]
pub struct Store {
    dir: PathBuf,
}

/// A shard read back from the store.
#[derive(Debug)]
pub struct Loaded {
    /// The rebuilt shard.
    pub shard: Shard,
    /// Experiments whose stored state could not be used.
    pub mismatches: Vec<ImageMismatch>,
}

fn io_err(path: &Path) -> impl FnOnce(io::Error) -> StoreError + '_ {
    move |source| StoreError::Io {
        path: path.to_path_buf(),
        source,
    }
}

impl Store {
    /// Open (creating if needed) the store under `dir`.
    pub fn open(dir: &Path) -> Result<Store, StoreError> {
        let dir = dir.join("shards");
        fs::create_dir_all(&dir).map_err(io_err(&dir))?;
        Ok(Store { dir })
    }

    /// The directory of shard files.
    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// File of shard `id`. Shard ids contain `/`; topic names cannot contain `~`.
    pub fn path(&self, id: &str) -> PathBuf {
        self.dir.join(format!("{}.state", id.replace('/', "~")))
    }

    /// Atomically replace the stored state of shard `id` with `image`.
    pub fn save(&self, id: &str, image: &ShardImage) -> Result<(), StoreError> {
        write_atomic_with(&self.path(id), |w| write_image(image, w).map(|_| ()))
    }

    /// The stored state of shard `id`, if any, rebuilt over `defs`.
    pub fn load(
        &self,
        id: &str,
        defs: &[Arc<ExperimentDef>],
    ) -> Result<Option<Loaded>, StoreError> {
        let path = self.path(id);
        let bytes = match fs::read(&path) {
            Ok(b) => b,
            Err(e) if e.kind() == io::ErrorKind::NotFound => return Ok(None),
            Err(e) => return Err(io_err(&path)(e)),
        };
        let image = decode(&bytes).map_err(|reason| StoreError::Corrupt {
            path: path.clone(),
            reason,
        })?;
        // Not needed any more; freeing it before the tables are built lowers the peak.
        drop(bytes);
        warn_if_without_exposures(id, &image);
        let (shard, mismatches) = Shard::from_image(defs, image);
        Ok(Some(Loaded { shard, mismatches }))
    }
}

/// Log, once per restore, that `image` is of the format without exposure times: its units
/// count as exposed since the epoch, so an outcome before such a unit's real exposure counts.
pub fn warn_if_without_exposures(id: &str, image: &ShardImage) {
    if image.experiments.iter().any(|e| e.exposures.is_none()) {
        tracing::warn!(
            shard = id,
            "stored state of format version {VERSION_WITHOUT_EXPOSURES} keeps no exposure times: its units count as exposed since the epoch until the next save (outcomes before their real exposure may count)"
        );
    }
}

/// Replace the file at `path` with `bytes` atomically: write a temporary file beside it,
/// fsync, rename over, fsync the directory. After a crash the file holds the old or the new
/// bytes, never a mix.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    write_atomic_with(path, |w| w.write_all(bytes))
}

/// The temporary file a save of `path` writes first.
fn temp_path(path: &Path) -> PathBuf {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    PathBuf::from(tmp)
}

/// [`write_atomic`] with the content streamed by `write` through a buffer, so a large state
/// is never held twice in memory (encoded and live). A failed write removes its temporary
/// file, so a full disk is not left fuller by the attempt.
fn write_atomic_with(
    path: &Path,
    write: impl FnOnce(&mut io::BufWriter<File>) -> io::Result<()>,
) -> Result<(), StoreError> {
    let tmp = temp_path(path);
    let written = (|| {
        let f = File::create(&tmp).map_err(io_err(&tmp))?;
        let mut w = io::BufWriter::with_capacity(1 << 20, f);
        write(&mut w).map_err(io_err(&tmp))?;
        let f = w
            .into_inner()
            .map_err(io::IntoInnerError::into_error)
            .map_err(io_err(&tmp))?;
        crash_point("save-tmp-written", path);
        f.sync_all().map_err(io_err(&tmp))
    })();
    if let Err(e) = written {
        let _ = fs::remove_file(&tmp);
        return Err(e);
    }
    crash_point("save-tmp-synced", path);
    if let Err(e) = fs::rename(&tmp, path) {
        let _ = fs::remove_file(&tmp);
        return Err(io_err(path)(e));
    }
    crash_point("save-renamed", path);
    // The rename is durable only once the directory entry is.
    sync_dir(path.parent().unwrap_or(Path::new(".")))
}

fn sync_dir(dir: &Path) -> Result<(), StoreError> {
    File::open(dir)
        .and_then(|d| d.sync_all())
        .map_err(io_err(dir))
}

/// Remove temporary files that a save interrupted by a crash left in `dir` (they are never
/// read; removing them gives their space back before anything else is written).
pub fn remove_stale_temps(dir: &Path) {
    let Ok(entries) = fs::read_dir(dir) else {
        return;
    };
    for entry in entries.flatten() {
        let path = entry.path();
        if path.extension().is_some_and(|e| e == "tmp") && path.is_file() {
            match fs::remove_file(&path) {
                Ok(()) => {
                    tracing::info!(file = %path.display(), "removed the temporary file of an interrupted save")
                }
                Err(e) => {
                    tracing::warn!(file = %path.display(), error = %e, "cannot remove the temporary file of an interrupted save")
                }
            }
        }
    }
}

/// Test hook: `POSTERIORD_TEST_CRASH_AT=<stage>[@<file name part>]` makes the process kill
/// itself with SIGKILL when a write reaches `<stage>` (for a file whose path contains the
/// part, if given), so the fault tests can stop a save at each of its steps. Stages:
/// `wal-partial` (half a log record written), `wal-written` (record written, not synced),
/// `wal-synced` (record durable, events not yet applied), `save-tmp-written`,
/// `save-tmp-synced`, `save-renamed` (a file replaced, directory not yet synced) and
/// `save-done` (a shard saved, its log segments not yet removed).
pub(crate) fn crash_point(stage: &str, path: &Path) {
    static PLAN: std::sync::OnceLock<Option<(String, String)>> = std::sync::OnceLock::new();
    let plan = PLAN.get_or_init(|| {
        let v = std::env::var("POSTERIORD_TEST_CRASH_AT").ok()?;
        let (s, f) = v.split_once('@').unwrap_or((&v, ""));
        Some((s.to_string(), f.to_string()))
    });
    let Some((s, f)) = plan else { return };
    if s == stage && path.to_string_lossy().contains(f.as_str()) {
        eprintln!(
            "POSTERIORD_TEST_CRASH_AT: killing the process at {stage} of {}",
            path.display()
        );
        // SAFETY: kill(2) on our own pid with a valid signal number has no memory effects.
        unsafe {
            libc::kill(libc::getpid(), libc::SIGKILL);
        }
    }
}

/// Free bytes available to posteriord on the file system holding `dir`, if it can be asked.
pub fn free_bytes(dir: &Path) -> Option<u64> {
    use std::os::unix::ffi::OsStrExt;
    let c = std::ffi::CString::new(dir.as_os_str().as_bytes()).ok()?;
    // SAFETY: statvfs writes only into the zeroed struct we pass; the path is NUL-terminated.
    let mut st: libc::statvfs = unsafe { std::mem::zeroed() };
    let rc = unsafe { libc::statvfs(c.as_ptr(), &mut st) };
    (rc == 0).then(|| st.f_bavail as u64 * st.f_frsize as u64)
}

/// Which stored files are failing to be written, and why. Shared by every writer of the
/// store directory; readiness and the `posteriord_state_durable` gauge read it.
#[derive(Debug, Clone, Default)]
pub struct StoreHealth {
    failing: Arc<std::sync::Mutex<std::collections::BTreeMap<String, String>>>,
}

impl StoreHealth {
    fn map(&self) -> std::sync::MutexGuard<'_, std::collections::BTreeMap<String, String>> {
        self.failing.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// `what` (a file or kind of file) could not be written: `error`.
    pub fn failed(&self, what: &str, error: &dyn std::fmt::Display) {
        self.map().insert(what.to_string(), error.to_string());
    }

    /// `what` was written.
    pub fn succeeded(&self, what: &str) {
        self.map().remove(what);
    }

    /// Record the result of writing `what`.
    pub fn note<T, E: std::fmt::Display>(&self, what: &str, result: &Result<T, E>) {
        match result {
            Ok(_) => self.succeeded(what),
            Err(e) => self.failed(what, e),
        }
    }

    /// Whether `what` is failing now.
    pub fn is_failing(&self, what: &str) -> bool {
        self.map().contains_key(what)
    }

    /// What is failing, by file or kind of file, with the last error.
    pub fn failing(&self) -> Vec<(String, String)> {
        self.map()
            .iter()
            .map(|(k, v)| (k.clone(), v.clone()))
            .collect()
    }
}

/// One record of the HTTP log: the events of one request, with the sequence number of the
/// first.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct WalRecord {
    /// Sequence number (HTTP shard offset) of the first event.
    pub first_seq: u64,
    /// The encoded events, in request order.
    pub events: Vec<Vec<u8>>,
    /// When the request was received (µs since the epoch): the reference its events' times
    /// are checked against, kept so a restart checks against the same. `None` for records
    /// written before it was kept (`PWR2` and the per-event log).
    pub received_at: Option<i64>,
}

/// Records with a receive time (written now).
const RECORD_MAGIC: &[u8; 4] = b"PWR3";
/// magic | first_seq u64 | count u32 | body length u32 | received_at i64 | CRC-32 of the
/// previous 28 bytes.
const HEADER: usize = 32;
/// Records of the previous version, still read: no receive time.
const RECORD_MAGIC_V2: &[u8; 4] = b"PWR2";
/// magic | first_seq u64 | count u32 | body length u32 | CRC-32 of the previous 20 bytes.
const HEADER_V2: usize = 24;
/// Largest body a record may claim, so a damaged header cannot make us allocate wildly.
const MAX_RECORD: usize = 1 << 30;

/// Write-ahead log for events that arrive without an input log of their own (HTTP ingest).
/// Each request's events are appended as **one record** and fsynced before any is applied;
/// a failed append is cut back off the file, so a refused request leaves nothing a restart
/// would apply.
///
/// Record: `"PWR3" | u64 first sequence | u32 event count | u32 body length | i64 receive
/// time (µs) | u32 CRC of the header`, then the body (`u32 length | bytes` per event) and a `u32` CRC of the body.
/// The log is a series of segment files `<name>.wal.<n>`; a save of the shard seals the
/// current segment (later appends start the next one), and once the saved file is durable
/// the sealed segments are deleted. Nothing is ever copied, so a restart after a full disk
/// needs no free space to read the log back.
///
/// Records of the previous version (`"PWR2"`, the same without the receive time) are still
/// read, so an upgrade over a log that was not yet saved away loses nothing.
///
/// Reading: a record cut short or failing its checksum at the very end of a segment is the
/// trace of a crash during an append (that request was never answered) and is ignored; any
/// other damage stops the start with the file, the byte and the fix.
#[derive(Debug)]
pub struct Wal {
    dir: PathBuf,
    name: String,
    /// Segment numbers present on disk, ascending (the current one may not exist yet).
    segments: Vec<u64>,
    /// Segment appends go to.
    current: u64,
    /// Length of the current segment's intact content (a failed append is cut back to it).
    current_len: u64,
    /// Whether the current segment's file and directory entry exist durably.
    current_exists: bool,
    /// A failed append that could not be cut back: the file must be cut to this length
    /// before anything else is appended.
    cut_pending: Option<u64>,
    /// The pre-segment log (`<name>.wal`, per-event records) of an older version, read on
    /// start and removed with the first sealed segments.
    legacy: Option<PathBuf>,
}

impl Wal {
    /// Open the log `name` in the store: finds its segments, writes nothing.
    pub fn open(store: &Store, name: &str) -> Result<Wal, StoreError> {
        let dir = store.dir.clone();
        let prefix = format!("{name}.wal.");
        let mut segments = Vec::new();
        for entry in fs::read_dir(&dir).map_err(io_err(&dir))? {
            let entry = entry.map_err(io_err(&dir))?;
            let file_name = entry.file_name();
            let Some(n) = file_name
                .to_str()
                .and_then(|f| f.strip_prefix(&prefix))
                .and_then(|n| n.parse::<u64>().ok())
            else {
                continue;
            };
            segments.push(n);
        }
        segments.sort_unstable();
        let legacy = dir.join(format!("{name}.wal"));
        let legacy = legacy.exists().then_some(legacy);
        // Appends after a restart go to a fresh segment: whatever the crash left at the end
        // of the last one stays where it is, behind a record boundary.
        let current = segments.last().map_or(1, |n| n + 1);
        Ok(Wal {
            dir,
            name: name.to_string(),
            segments,
            current,
            current_len: 0,
            current_exists: false,
            cut_pending: None,
            legacy,
        })
    }

    /// Path of segment `n`.
    pub fn segment_path(&self, n: u64) -> PathBuf {
        self.dir.join(format!("{}.wal.{n:010}", self.name))
    }

    /// Bytes the log holds on disk.
    pub fn disk_bytes(&self) -> u64 {
        let mut paths: Vec<PathBuf> = self
            .segments
            .iter()
            .map(|&n| self.segment_path(n))
            .collect();
        paths.extend(self.legacy.clone());
        paths
            .iter()
            .filter_map(|p| fs::metadata(p).ok())
            .map(|m| m.len())
            .sum()
    }

    fn encode(first_seq: u64, received_at: i64, items: &[&[u8]]) -> Vec<u8> {
        let body_len: usize = items.iter().map(|b| 4 + b.len()).sum();
        let mut out = Vec::with_capacity(HEADER + body_len + 4);
        out.extend_from_slice(RECORD_MAGIC);
        out.extend_from_slice(&first_seq.to_le_bytes());
        out.extend_from_slice(&(items.len() as u32).to_le_bytes());
        out.extend_from_slice(&(body_len as u32).to_le_bytes());
        out.extend_from_slice(&received_at.to_le_bytes());
        let crc = crc32fast::hash(&out[..HEADER - 4]);
        out.extend_from_slice(&crc.to_le_bytes());
        for b in items {
            out.extend_from_slice(&(b.len() as u32).to_le_bytes());
            out.extend_from_slice(b);
        }
        let crc = crc32fast::hash(&out[HEADER..]);
        out.extend_from_slice(&crc.to_le_bytes());
        out
    }

    /// Size on disk of the record of `items`.
    pub fn record_bytes(items: &[&[u8]]) -> u64 {
        (HEADER + items.iter().map(|b| 4 + b.len()).sum::<usize>() + 4) as u64
    }

    /// Append the events of one request, numbered from `first_seq` and received at
    /// `received_at` (µs), as one record and make it durable. On error the file is cut back
    /// to where it was: nothing of the request remains to be replayed.
    pub fn append(
        &mut self,
        first_seq: u64,
        received_at: i64,
        items: &[&[u8]],
    ) -> Result<(), StoreError> {
        let path = self.segment_path(self.current);
        if let Some(len) = self.cut_pending {
            let f = fs::OpenOptions::new()
                .write(true)
                .open(&path)
                .map_err(io_err(&path))?;
            f.set_len(len)
                .and_then(|()| f.sync_all())
                .map_err(io_err(&path))?;
            self.cut_pending = None;
        }
        let record = Wal::encode(first_seq, received_at, items);
        // Opened per append, not held: a file held open for writing would stop an operator
        // from remounting the directory read-only, and opening costs microseconds.
        let mut file = fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(io_err(&path))?;
        if !self.current_exists {
            // A new segment's name must be durable before a record in it is acknowledged.
            if let Err(e) = sync_dir(&self.dir) {
                drop(file);
                let _ = fs::remove_file(&path);
                return Err(e);
            }
            self.current_exists = true;
            if self.segments.last() != Some(&self.current) {
                self.segments.push(self.current);
            }
        }
        let start = self.current_len;
        let result = (|| {
            if crash_enabled() {
                let half = record.len() / 2;
                file.write_all(&record[..half])?;
                crash_point("wal-partial", &path);
                file.write_all(&record[half..])?;
                crash_point("wal-written", &path);
            } else {
                file.write_all(&record)?;
            }
            file.sync_data()
        })();
        match result {
            Ok(()) => {
                crash_point("wal-synced", &path);
                self.current_len = start + record.len() as u64;
                Ok(())
            }
            Err(e) => {
                // Cut the partial or unsynced record off, so no restart applies a request
                // that was refused.
                let cut = file.set_len(start).and_then(|()| file.sync_all());
                if let Err(cut_error) = cut {
                    tracing::error!(file = %path.display(), error = %cut_error, "cannot cut a refused request off the HTTP write-ahead log; no request is accepted until it is cut");
                    self.cut_pending = Some(start);
                }
                Err(io_err(&path)(e))
            }
        }
    }

    /// Seal the current segment: later appends start a new one. Returns the last sealed
    /// segment, to pass to [`Wal::remove_sealed`] once the state holding their events is
    /// durable.
    pub fn seal(&mut self) -> u64 {
        let sealed = self.current;
        if self.current_exists || self.current_len > 0 {
            self.current += 1;
            self.current_len = 0;
            self.current_exists = false;
            self.cut_pending = None;
        }
        sealed
    }

    /// Delete segments up to `sealed` (and the legacy file): the stored state holds their
    /// events.
    pub fn remove_sealed(&mut self, sealed: u64) -> Result<(), StoreError> {
        let current = self.current;
        let mut removed = false;
        let mut result = Ok(());
        let mut keep = Vec::new();
        for &n in &self.segments {
            if n <= sealed && n != current {
                let path = self.segment_path(n);
                match fs::remove_file(&path) {
                    Ok(()) => removed = true,
                    Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                    Err(e) => {
                        keep.push(n);
                        result = Err(io_err(&path)(e));
                    }
                }
            } else {
                keep.push(n);
            }
        }
        self.segments = keep;
        if let Some(legacy) = self.legacy.take() {
            match fs::remove_file(&legacy) {
                Ok(()) => removed = true,
                Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                Err(e) => {
                    result = Err(io_err(&legacy)(e));
                    self.legacy = Some(legacy);
                }
            }
        }
        if removed {
            // Not needed for correctness (a segment that comes back holds events the state
            // already has, which replay skips by sequence number); it just frees space sooner.
            let _ = sync_dir(&self.dir);
        }
        result
    }

    /// Every intact record, oldest first, and how many torn tails (crashes mid-append) were
    /// skipped. Damage anywhere else is an error naming the file, the byte and the fix.
    pub fn read(&self) -> Result<(Vec<WalRecord>, usize), StoreError> {
        let mut records = Vec::new();
        let mut torn = 0;
        if let Some(legacy) = &self.legacy {
            let bytes = fs::read(legacy).map_err(io_err(legacy))?;
            let (mut r, t) = read_legacy(&bytes);
            records.append(&mut r);
            torn += usize::from(t);
        }
        for &n in &self.segments {
            let path = self.segment_path(n);
            let bytes = match fs::read(&path) {
                Ok(b) => b,
                Err(e) if e.kind() == io::ErrorKind::NotFound => continue,
                Err(e) => return Err(io_err(&path)(e)),
            };
            let (mut r, t) = read_segment(&bytes).map_err(|(at, reason)| StoreError::Corrupt {
                path: path.clone(),
                reason: format!(
                    "{reason} at byte {at} of {len}; the events after it were acknowledged to clients. \
                     Fix: restore the file from a backup, or accept losing the requests from that byte on \
                     with `truncate -s {at} {file}` and start again",
                    len = bytes.len(),
                    file = path.display()
                ),
            })?;
            records.append(&mut r);
            torn += usize::from(t);
        }
        Ok((records, torn))
    }
}

fn crash_enabled() -> bool {
    static ON: std::sync::OnceLock<bool> = std::sync::OnceLock::new();
    *ON.get_or_init(|| std::env::var_os("POSTERIORD_TEST_CRASH_AT").is_some())
}

/// Records of one segment, and whether it ended in a torn record. `Err((byte, reason))` for
/// damage that is not a torn end.
fn read_segment(bytes: &[u8]) -> Result<(Vec<WalRecord>, bool), (usize, String)> {
    let mut records = Vec::new();
    let mut pos = 0;
    while pos < bytes.len() {
        let rest = &bytes[pos..];
        // A torn end: the header or the body runs past the end of the file, or what
        // follows is zeros (the file was extended but the bytes never reached the disk, as
        // after a power cut), or the last record's checksum field was never written.
        if rest.len() < HEADER_V2 || rest.iter().all(|&b| b == 0) {
            return Ok((records, true));
        }
        // The version is in the magic; each version's header has its own length.
        let header_len = if &rest[..4] == RECORD_MAGIC {
            HEADER
        } else {
            HEADER_V2
        };
        if rest.len() < header_len {
            return Ok((records, true));
        }
        let header = &rest[..header_len];
        let header_ok = (&header[..4] == RECORD_MAGIC || &header[..4] == RECORD_MAGIC_V2)
            && crc32fast::hash(&header[..header_len - 4])
                == u32::from_le_bytes(header[header_len - 4..].try_into().expect("4 bytes"));
        if !header_ok {
            return Err((pos, "a damaged record header".into()));
        }
        let first_seq = u64::from_le_bytes(header[4..12].try_into().expect("8 bytes"));
        let count = u32::from_le_bytes(header[12..16].try_into().expect("4 bytes")) as usize;
        let body_len = u32::from_le_bytes(header[16..20].try_into().expect("4 bytes")) as usize;
        let received_at = (header_len == HEADER)
            .then(|| i64::from_le_bytes(header[20..28].try_into().expect("8 bytes")));
        if body_len > MAX_RECORD {
            return Err((pos, format!("a record claiming {body_len} bytes")));
        }
        let end = pos + header_len + body_len + 4;
        if end > bytes.len() {
            return Ok((records, true));
        }
        let body = &bytes[pos + header_len..pos + header_len + body_len];
        let crc = u32::from_le_bytes(bytes[end - 4..end].try_into().expect("4 bytes"));
        if crc32fast::hash(body) != crc {
            if end == bytes.len() && crc == 0 {
                return Ok((records, true));
            }
            return Err((pos, "a record failing its checksum".into()));
        }
        let mut events = Vec::with_capacity(count);
        let mut at = 0;
        for _ in 0..count {
            let len = body
                .get(at..at + 4)
                .map(|b| u32::from_le_bytes(b.try_into().expect("4 bytes")) as usize);
            let Some(event) = len.and_then(|len| body.get(at + 4..at + 4 + len)) else {
                return Err((pos, "a record whose events do not fit its length".into()));
            };
            events.push(event.to_vec());
            at += 4 + event.len();
        }
        if at != body.len() {
            return Err((pos, "a record with bytes after its events".into()));
        }
        records.push(WalRecord {
            first_seq,
            events,
            received_at,
        });
        pos = end;
    }
    Ok((records, false))
}

/// Records of the log written by earlier versions (one record per event:
/// `u64 sequence | u32 length | bytes | u32 CRC`), each read as a record of one event.
fn read_legacy(bytes: &[u8]) -> (Vec<WalRecord>, bool) {
    let mut records = Vec::new();
    let mut pos = 0;
    while pos < bytes.len() {
        let Some(header) = bytes.get(pos..pos + 12) else {
            return (records, true);
        };
        let seq = u64::from_le_bytes(header[..8].try_into().expect("8 bytes"));
        let len = u32::from_le_bytes(header[8..12].try_into().expect("4 bytes")) as usize;
        let end = pos + 12 + len;
        let Some(crc_bytes) = bytes.get(end..end + 4) else {
            return (records, true);
        };
        let crc = u32::from_le_bytes(crc_bytes.try_into().expect("4 bytes"));
        if crc32fast::hash(&bytes[pos..end]) != crc {
            return (records, true);
        }
        records.push(WalRecord {
            first_seq: seq,
            events: vec![bytes[pos + 12..end].to_vec()],
            received_at: None,
        });
        pos = end + 4;
    }
    (records, false)
}

/// Little-endian writer that keeps the running CRC-32 and the first I/O error, so the encoder
/// reads straight through and the file is written without first building it in memory (with
/// ten million units, the encoded copy alone would be 120 MB on top of the state).
struct Writer<W: Write> {
    out: W,
    crc: crc32fast::Hasher,
    error: Option<io::Error>,
}

impl<W: Write> Writer<W> {
    fn new(out: W) -> Writer<W> {
        Writer {
            out,
            crc: crc32fast::Hasher::new(),
            error: None,
        }
    }
    fn put(&mut self, bytes: &[u8]) {
        if self.error.is_none() {
            self.crc.update(bytes);
            if let Err(e) = self.out.write_all(bytes) {
                self.error = Some(e);
            }
        }
    }
    fn u8(&mut self, v: u8) {
        self.put(&[v]);
    }
    fn u32(&mut self, v: u32) {
        self.put(&v.to_le_bytes());
    }
    fn u64(&mut self, v: u64) {
        self.put(&v.to_le_bytes());
    }
    fn i64(&mut self, v: i64) {
        self.put(&v.to_le_bytes());
    }
    fn f64(&mut self, v: f64) {
        self.put(&v.to_bits().to_le_bytes());
    }
    fn str(&mut self, s: &str) {
        self.u32(s.len() as u32);
        self.put(s.as_bytes());
    }
    fn len(&mut self, n: usize) {
        self.u64(n as u64);
    }
    /// Append the CRC of everything written and hand back the output.
    fn finish(mut self) -> io::Result<W> {
        let crc = self.crc.clone().finalize();
        if self.error.is_none() {
            if let Err(e) = self.out.write_all(&crc.to_le_bytes()) {
                self.error = Some(e);
            }
        }
        match self.error {
            Some(e) => Err(e),
            None => Ok(self.out),
        }
    }
}

fn kind_code(kind: MetricKind) -> u8 {
    match kind {
        MetricKind::Conversion => 0,
        MetricKind::DefectRate(ExposureBasis::Units) => 1,
        MetricKind::DefectRate(ExposureBasis::Reported) => 2,
    }
}

/// Encode a shard image (public for tests and tools).
pub fn encode(image: &ShardImage) -> Vec<u8> {
    let units: usize = image.experiments.iter().map(|e| e.units.len()).sum();
    write_image(image, Vec::with_capacity(64 + units * 12)).expect("writing to memory cannot fail")
}

/// Write the encoding of `image` to `out`.
fn write_image<W: Write>(image: &ShardImage, out: W) -> io::Result<W> {
    write_image_as(image, out, VERSION)
}

/// Write the encoding of `image` in format `version` ([`VERSION`], or the previous one for
/// tests of reading it).
fn write_image_as<W: Write>(image: &ShardImage, out: W, version: u32) -> io::Result<W> {
    let current = version >= VERSION_WITHOUT_BOUNDARY_MARK;
    let mut w = Writer::new(out);
    w.put(MAGIC);
    w.u32(version);
    w.i64(image.next_offset.unwrap_or(NONE_I64));
    w.len(image.experiments.len());
    for e in &image.experiments {
        w.str(&e.id);
        w.len(e.variants.len());
        for v in &e.variants {
            w.str(v);
        }
        w.len(e.metrics.len());
        for (name, kind) in &e.metrics {
            w.str(name);
            w.u8(kind_code(*kind));
        }
        w.len(e.units.len());
        for &UnitRecord { key, raw } in &e.units {
            w.u64(key);
            w.u32(raw);
        }
        w.len(e.seen_ids.len());
        for id in &e.seen_ids {
            w.u64(*id);
        }
        for u in &e.variant_units {
            w.u64(*u);
        }
        for t in &e.totals {
            match t {
                MetricTotals::Conversion(v) => {
                    for x in v {
                        w.u64(x.trials);
                        w.u64(x.successes);
                    }
                }
                MetricTotals::Defect(v) => {
                    for x in v {
                        w.u64(x.count);
                        w.f64(x.exposure);
                    }
                }
            }
        }
        for n in e.outcomes.0 {
            w.u64(n);
        }
        w.i64(e.last_event_time.unwrap_or(NONE_I64));
        w.i64(e.first_event_time.unwrap_or(NONE_I64));
        if !current {
            continue;
        }
        match &e.exposures {
            None => w.u8(0),
            Some(records) => {
                w.u8(1);
                w.len(records.len());
                for &ExposureRecord { key, secs } in records {
                    w.u64(key);
                    w.u32(secs);
                }
            }
        }
    }
    if !current {
        return w.finish();
    }
    w.len(image.streams.len());
    for (topic, next) in &image.streams {
        w.str(topic);
        w.i64(*next);
    }
    w.i64(image.watermark.unwrap_or(NONE_I64));
    w.i64(image.outcome_mark.unwrap_or(NONE_I64));
    w.len(image.held.len());
    for event in &image.held {
        let EventBody::Outcome {
            metric,
            unit,
            count,
            exposure,
        } = &event.body
        else {
            unreachable!("only outcomes naming no experiment are held");
        };
        w.i64(event.time.unwrap_or(NONE_I64));
        w.str(metric);
        w.str(unit);
        w.u64(*count);
        w.u8(u8::from(exposure.is_some()));
        w.f64(exposure.unwrap_or(0.0));
        w.u8(u8::from(event.id.is_some()));
        w.str(event.id.as_deref().unwrap_or(""));
    }
    if version >= 4 {
        w.i64(image.boundary_mark.unwrap_or(NONE_I64));
    }
    w.finish()
}

struct Reader<'a> {
    bytes: &'a [u8],
    pos: usize,
}

impl<'a> Reader<'a> {
    fn take(&mut self, n: usize) -> Result<&'a [u8], String> {
        let end = self.pos.checked_add(n).filter(|&e| e <= self.bytes.len());
        let end = end.ok_or_else(|| format!("truncated at byte {}", self.pos))?;
        let s = &self.bytes[self.pos..end];
        self.pos = end;
        Ok(s)
    }
    fn u8(&mut self) -> Result<u8, String> {
        Ok(self.take(1)?[0])
    }
    fn u32(&mut self) -> Result<u32, String> {
        Ok(u32::from_le_bytes(
            self.take(4)?.try_into().expect("4 bytes"),
        ))
    }
    fn u64(&mut self) -> Result<u64, String> {
        Ok(u64::from_le_bytes(
            self.take(8)?.try_into().expect("8 bytes"),
        ))
    }
    fn i64(&mut self) -> Result<i64, String> {
        Ok(i64::from_le_bytes(
            self.take(8)?.try_into().expect("8 bytes"),
        ))
    }
    fn f64(&mut self) -> Result<f64, String> {
        Ok(f64::from_bits(self.u64()?))
    }
    fn str(&mut self) -> Result<String, String> {
        let n = self.u32()? as usize;
        String::from_utf8(self.take(n)?.to_vec()).map_err(|_| "a name is not UTF-8".to_string())
    }
    /// A count of items of `item_bytes` each, checked against what is left so a damaged count
    /// cannot make us allocate wildly.
    fn len(&mut self, item_bytes: usize) -> Result<usize, String> {
        let n = self.u64()?;
        let left = (self.bytes.len() - self.pos) as u64;
        if n.saturating_mul(item_bytes.max(1) as u64) > left {
            return Err(format!("a count of {n} exceeds the file"));
        }
        Ok(n as usize)
    }
}

fn opt(v: i64) -> Option<i64> {
    (v != NONE_I64).then_some(v)
}

/// Decode a shard image; the error says what is wrong.
pub fn decode(bytes: &[u8]) -> Result<ShardImage, String> {
    if bytes.len() < MAGIC.len() + 4 + 4 {
        return Err("too short".into());
    }
    let (body, trailer) = bytes.split_at(bytes.len() - 4);
    let crc = u32::from_le_bytes(trailer.try_into().expect("4 bytes"));
    if crc32fast::hash(body) != crc {
        return Err("checksum mismatch".into());
    }
    let mut r = Reader {
        bytes: body,
        pos: 0,
    };
    if r.take(8)? != MAGIC {
        return Err("not a posteriord shard file".into());
    }
    let version = r.u32()?;
    if !(VERSION_WITHOUT_EXPOSURES..=VERSION).contains(&version) {
        return Err(format!(
            "format version {version}; this build reads {VERSION_WITHOUT_EXPOSURES} to {VERSION}"
        ));
    }
    let current = version >= VERSION_WITHOUT_BOUNDARY_MARK;
    let next_offset = opt(r.i64()?);
    let n_experiments = r.len(8)?;
    let mut experiments = Vec::with_capacity(n_experiments);
    for _ in 0..n_experiments {
        let id = r.str()?;
        let n_variants = r.len(4)?;
        let variants = (0..n_variants)
            .map(|_| r.str())
            .collect::<Result<Vec<_>, _>>()?;
        let n_metrics = r.len(5)?;
        let mut metrics = Vec::with_capacity(n_metrics);
        for _ in 0..n_metrics {
            let name = r.str()?;
            let kind = match r.u8()? {
                0 => MetricKind::Conversion,
                1 => MetricKind::DefectRate(ExposureBasis::Units),
                2 => MetricKind::DefectRate(ExposureBasis::Reported),
                k => return Err(format!("unknown metric kind code {k}")),
            };
            metrics.push((name, kind));
        }
        let n_units = r.len(12)?;
        let mut units = Vec::with_capacity(n_units);
        for _ in 0..n_units {
            units.push(UnitRecord {
                key: r.u64()?,
                raw: r.u32()?,
            });
        }
        let n_ids = r.len(8)?;
        let seen_ids = (0..n_ids).map(|_| r.u64()).collect::<Result<Vec<_>, _>>()?;
        let variant_units = (0..n_variants)
            .map(|_| r.u64())
            .collect::<Result<Vec<_>, _>>()?;
        let mut totals = Vec::with_capacity(n_metrics);
        for (_, kind) in &metrics {
            totals.push(match kind {
                MetricKind::Conversion => MetricTotals::Conversion(
                    (0..n_variants)
                        .map(|_| {
                            Ok(ConversionTotals {
                                trials: r.u64()?,
                                successes: r.u64()?,
                            })
                        })
                        .collect::<Result<Vec<_>, String>>()?,
                ),
                MetricKind::DefectRate(_) => MetricTotals::Defect(
                    (0..n_variants)
                        .map(|_| {
                            Ok(DefectTotals {
                                count: r.u64()?,
                                exposure: r.f64()?,
                            })
                        })
                        .collect::<Result<Vec<_>, String>>()?,
                ),
            });
        }
        let mut outcomes = OutcomeCounts::default();
        for slot in outcomes.0.iter_mut().take(Outcome::ALL.len()) {
            *slot = r.u64()?;
        }
        let last_event_time = opt(r.i64()?);
        let first_event_time = opt(r.i64()?);
        let exposures = match current && r.u8()? == 1 {
            false => None,
            true => {
                let n = r.len(12)?;
                let mut records = Vec::with_capacity(n);
                for _ in 0..n {
                    records.push(ExposureRecord {
                        key: r.u64()?,
                        secs: r.u32()?,
                    });
                }
                Some(records)
            }
        };
        experiments.push(ExperimentImage {
            id,
            variants,
            metrics,
            units,
            seen_ids,
            variant_units,
            totals,
            outcomes,
            last_event_time,
            first_event_time,
            exposures,
        });
    }
    let mut image = ShardImage {
        next_offset,
        experiments,
        ..ShardImage::default()
    };
    if current {
        let n = r.len(12)?;
        for _ in 0..n {
            let topic = r.str()?;
            image.streams.push((topic, r.i64()?));
        }
        image.watermark = opt(r.i64()?);
        image.outcome_mark = opt(r.i64()?);
        let n = r.len(40)?;
        for _ in 0..n {
            let time = opt(r.i64()?);
            let metric = r.str()?;
            let unit = r.str()?;
            let count = r.u64()?;
            let has_exposure = r.u8()? == 1;
            let exposure = r.f64()?;
            let has_id = r.u8()? == 1;
            let id = r.str()?;
            image.held.push(Event {
                experiment: "".into(),
                id: has_id.then(|| id.into()),
                time,
                body: EventBody::Outcome {
                    metric: metric.into(),
                    unit: unit.into(),
                    count,
                    exposure: has_exposure.then_some(exposure),
                },
            });
        }
        if version >= 4 {
            image.boundary_mark = opt(r.i64()?);
        }
    }
    if r.pos != body.len() {
        return Err(format!("{} unexpected trailing bytes", body.len() - r.pos));
    }
    Ok(image)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::event::{Event, EventBody};
    use std::borrow::Cow;

    use crate::service::test_checkout_copy as checkout_copy;

    fn defs() -> Vec<Arc<ExperimentDef>> {
        vec![Arc::new(checkout_copy())]
    }

    fn filled_shard() -> Shard {
        let defs = defs();
        let mut shard = Shard::new(&defs);
        for i in 0..500 {
            let unit = format!("u{i}");
            let e = Event {
                experiment: Cow::Borrowed("crumb-checkout-copy"),
                id: Some(Cow::Owned(format!("e{i}"))),
                time: Some(1_000 + i),
                body: EventBody::Exposure {
                    variant: Cow::Borrowed(if i % 2 == 0 { "control" } else { "short-copy" }),
                    unit: Cow::Owned(unit.clone()),
                },
            };
            shard.apply(&e).unwrap();
            if i % 3 == 0 {
                let c = Event {
                    experiment: Cow::Borrowed("crumb-checkout-copy"),
                    id: None,
                    time: Some(2_000 + i),
                    body: EventBody::Conversion {
                        metric: Cow::Borrowed("purchase"),
                        unit: Cow::Owned(unit),
                    },
                };
                shard.apply(&c).unwrap();
            }
        }
        shard.advance(1233);
        shard
    }

    #[test]
    fn a_shard_survives_the_round_trip_exactly() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        let shard = filled_shard();
        store.save("kafka/exp-events/3", &shard.image()).unwrap();
        let loaded = store.load("kafka/exp-events/3", &defs()).unwrap().unwrap();
        assert!(loaded.mismatches.is_empty());
        assert_eq!(loaded.shard.next_offset(), Some(1234));
        let mut a = shard.image();
        let mut b = loaded.shard.image();
        for img in a.experiments.iter_mut().chain(b.experiments.iter_mut()) {
            img.units.sort_unstable();
            img.seen_ids.sort_unstable();
            img.exposures.as_mut().expect("kept").sort_unstable();
        }
        assert_eq!(a, b);
        // Restored dedup state still works: the same id is a duplicate.
        let mut restored = loaded.shard;
        let again = Event {
            experiment: Cow::Borrowed("crumb-checkout-copy"),
            id: Some(Cow::Borrowed("e7")),
            time: None,
            body: EventBody::Exposure {
                variant: Cow::Borrowed("control"),
                unit: Cow::Borrowed("fresh"),
            },
        };
        assert_eq!(restored.apply(&again), Ok(Outcome::DuplicateId));
        assert!(store.load("kafka/other/0", &defs()).unwrap().is_none());
    }

    /// An outcome naming no experiment, for unit `unit` at `secs`.
    fn outcome(unit: &str, secs: i64) -> Event<'static> {
        Event {
            experiment: Cow::Borrowed(""),
            id: None,
            time: Some(secs * 1_000_000),
            body: EventBody::Outcome {
                metric: Cow::Borrowed("purchase"),
                unit: Cow::Owned(unit.to_string()),
                count: 1,
                exposure: None,
            },
        }
    }

    /// A shard where unit `late` was exposed at second 5 000 and unit `early` at second 100.
    fn exposed_shard() -> Shard {
        let mut shard = Shard::new(&defs());
        for (unit, secs) in [("early", 100), ("late", 5_000)] {
            let e = Event {
                experiment: Cow::Borrowed("crumb-checkout-copy"),
                id: None,
                time: Some(secs * 1_000_000),
                body: EventBody::Exposure {
                    variant: Cow::Borrowed("control"),
                    unit: Cow::Borrowed(unit),
                },
            };
            assert_eq!(shard.apply(&e), Ok(Outcome::Applied));
        }
        shard
    }

    #[test]
    fn exposure_times_survive_a_restart() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        store
            .save("kafka/+units/0", &exposed_shard().image())
            .unwrap();
        let mut restored = store
            .load("kafka/+units/0", &defs())
            .unwrap()
            .unwrap()
            .shard;
        // Before the exposure of `late` (second 5 000): not counted, as before the restart.
        assert_eq!(
            restored.apply(&outcome("late", 4_000)),
            Ok(Outcome::BeforeExposure)
        );
        assert_eq!(
            restored.apply(&outcome("early", 4_000)),
            Ok(Outcome::Applied)
        );
        assert_eq!(
            restored.apply(&outcome("late", 5_000)),
            Ok(Outcome::Applied)
        );
        let e = restored.engine().experiment("crumb-checkout-copy").unwrap();
        let purchase = &e.snapshot().metrics[0];
        let MetricTotals::Conversion(v) = purchase else {
            panic!("purchase is a conversion metric")
        };
        assert_eq!(v[0].successes, 2);
    }

    #[test]
    fn images_of_the_previous_version_restore_with_units_exposed_since_the_epoch() {
        let mut image = exposed_shard().image();
        image.next_offset = Some(7);
        let mut bytes = Vec::new();
        bytes = write_image_as(&image, bytes, VERSION_WITHOUT_EXPOSURES).unwrap();
        let old = decode(&bytes).unwrap();
        assert_eq!(old.next_offset, Some(7));
        assert!(old.experiments.iter().all(|e| e.exposures.is_none()));
        let (mut shard, mismatches) = Shard::from_image(&defs(), old);
        assert!(mismatches.is_empty());
        // The old behaviour, as documented: the exposure time is unknown, so it counts.
        assert_eq!(shard.apply(&outcome("late", 4_000)), Ok(Outcome::Applied));
        // The next save writes the current version, with the times as they now stand.
        let again = decode(&encode(&shard.image())).unwrap();
        assert!(again.experiments.iter().all(|e| e.exposures.is_some()));
    }

    #[test]
    fn co_partitioned_positions_and_held_outcomes_survive_a_restart() {
        let mut shard = exposed_shard();
        assert!(shard.advance_stream("rides", 41));
        assert!(shard.advance_stream("assignments", 9));
        assert!(!shard.advance_stream("rides", 12), "already applied");
        assert_eq!(shard.next_offset(), Some(42 + 10));
        shard.note_assignment_time(6_000_000_000);
        let mut held = outcome("late", 7_000);
        held.id = Some(Cow::Borrowed("ride-9"));
        shard.hold(held.clone().into_owned());
        shard.note_outcome_time(7_000_000_000);
        let bytes = encode(&shard.image());
        let image = decode(&bytes).unwrap();
        assert_eq!(
            image.streams,
            vec![("assignments".into(), 10), ("rides".into(), 42)]
        );
        assert_eq!(image.watermark, Some(6_000_000_000));
        assert_eq!(image.outcome_mark, Some(7_000_000_000));
        assert_eq!(image.held, vec![held.clone()]);
        let (mut restored, _) = Shard::from_image(&defs(), image);
        assert_eq!(restored.stream_offset("rides"), Some(42));
        assert_eq!(restored.n_held(), 1);
        assert!(
            restored.take_releasable(300_000_000).is_empty(),
            "still ahead of the watermark"
        );
        restored.note_assignment_time(7_001_000_000);
        let out = restored.take_releasable(300_000_000);
        assert_eq!(out.len(), 1);
        assert_eq!(out[0].0, held);
    }

    fn seqs(wal: &Wal) -> Vec<(u64, usize)> {
        let (records, _) = wal.read().unwrap();
        records
            .iter()
            .map(|r| (r.first_seq, r.events.len()))
            .collect()
    }

    #[test]
    fn a_request_is_one_record_and_saved_segments_go_without_a_copy() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        let mut wal = Wal::open(&store, "http").unwrap();
        wal.append(0, 1_000, &[b"one", b"two"]).unwrap();
        let sealed = wal.seal();
        wal.append(2, 1_000 + 2, &[b"three"]).unwrap();
        assert_eq!(seqs(&wal), vec![(0, 2), (2, 1)]);
        let (records, torn) = wal.read().unwrap();
        assert_eq!(torn, 0);
        assert_eq!(records[0].events, vec![b"one".to_vec(), b"two".to_vec()]);
        wal.remove_sealed(sealed).unwrap();
        assert_eq!(seqs(&wal), vec![(2, 1)]);
        // A restart appends to a fresh segment and reads the old ones in place.
        let mut wal = Wal::open(&store, "http").unwrap();
        wal.append(3, 1_000 + 3, &[b"four", b"five"]).unwrap();
        assert_eq!(seqs(&wal), vec![(2, 1), (3, 2)]);
        assert_eq!(Wal::record_bytes(&[b"four", b"five"]), 32 + 8 + 8 + 4);
        // Each record keeps its receive time.
        let (records, _) = wal.read().unwrap();
        assert_eq!(records[1].received_at, Some(1_003));
    }

    #[test]
    fn a_torn_end_is_skipped_and_damage_elsewhere_names_the_file_and_the_fix() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        let mut wal = Wal::open(&store, "http").unwrap();
        wal.append(0, 1_000, &[b"alpha", b"beta"]).unwrap();
        wal.append(2, 1_000 + 2, &[b"gamma"]).unwrap();
        let path = wal.segment_path(1);
        let good = std::fs::read(&path).unwrap();
        let first_len = 32 + 4 + 5 + 4 + 4 + 4;
        // Cut anywhere inside the last record: the trace of a crash mid-append.
        for cut in [
            first_len + 1,
            first_len + 23,
            first_len + 30,
            good.len() - 1,
        ] {
            std::fs::write(&path, &good[..cut]).unwrap();
            let (records, torn) = wal.read().unwrap();
            assert_eq!((records.len(), torn), (1, 1), "cut at {cut}");
        }
        // Zeros where the last record should be (extended, never written): torn too.
        let mut zeroed = good.clone();
        zeroed[first_len..].fill(0);
        std::fs::write(&path, &zeroed).unwrap();
        assert_eq!(wal.read().unwrap().0.len(), 1);
        // A flipped bit in a complete record, first or last, is damage, not a torn end.
        for flip in [3, 10, 30, first_len + 26, good.len() - 2] {
            let mut bad = good.clone();
            bad[flip] ^= 0x10;
            std::fs::write(&path, &bad).unwrap();
            let e = wal.read().unwrap_err().to_string();
            assert!(
                e.contains(&path.display().to_string())
                    && e.contains("Fix:")
                    && e.contains("truncate -s"),
                "flip at {flip}: {e}"
            );
        }
    }

    #[test]
    fn records_of_the_previous_version_are_read_without_a_receive_time() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        // A `PWR2` record as the previous version wrote it, then a current one after it.
        let mut rec = Vec::new();
        rec.extend_from_slice(RECORD_MAGIC_V2);
        rec.extend_from_slice(&7u64.to_le_bytes());
        rec.extend_from_slice(&1u32.to_le_bytes());
        rec.extend_from_slice(&(4u32 + 3).to_le_bytes());
        let crc = crc32fast::hash(&rec[..20]);
        rec.extend_from_slice(&crc.to_le_bytes());
        rec.extend_from_slice(&3u32.to_le_bytes());
        rec.extend_from_slice(b"old");
        let crc = crc32fast::hash(&rec[HEADER_V2..]);
        rec.extend_from_slice(&crc.to_le_bytes());
        rec.extend_from_slice(&Wal::encode(8, 42, &[b"new"]));
        let path = Wal::open(&store, "http").unwrap().segment_path(1);
        std::fs::write(path, &rec).unwrap();
        let wal = Wal::open(&store, "http").unwrap();
        let (records, torn) = wal.read().unwrap();
        assert_eq!(torn, 0);
        assert_eq!(
            records,
            vec![
                WalRecord {
                    first_seq: 7,
                    events: vec![b"old".to_vec()],
                    received_at: None
                },
                WalRecord {
                    first_seq: 8,
                    events: vec![b"new".to_vec()],
                    received_at: Some(42)
                },
            ]
        );
    }

    #[test]
    fn the_log_of_earlier_versions_is_read_and_removed_with_the_first_save() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        let mut old = Vec::new();
        for (seq, bytes) in [(0u64, &b"one"[..]), (1, b"two")] {
            let start = old.len();
            old.extend_from_slice(&seq.to_le_bytes());
            old.extend_from_slice(&(bytes.len() as u32).to_le_bytes());
            old.extend_from_slice(bytes);
            let crc = crc32fast::hash(&old[start..]);
            old.extend_from_slice(&crc.to_le_bytes());
        }
        let legacy = dir.path().join("shards/http.wal");
        std::fs::write(&legacy, &old).unwrap();
        let mut wal = Wal::open(&store, "http").unwrap();
        wal.append(2, 1_000 + 2, &[b"three"]).unwrap();
        assert_eq!(seqs(&wal), vec![(0, 1), (1, 1), (2, 1)]);
        let sealed = wal.seal();
        wal.remove_sealed(sealed).unwrap();
        assert!(!legacy.exists());
        assert!(seqs(&wal).is_empty());
    }

    #[test]
    fn a_failed_save_leaves_no_temporary_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("x.json");
        let e = write_atomic_with(&path, |_| Err(io::Error::other("disk full"))).unwrap_err();
        assert!(e.to_string().contains("x.json.tmp"), "{e}");
        assert!(std::fs::read_dir(dir.path()).unwrap().next().is_none());
        std::fs::write(dir.path().join("y.state.tmp"), b"half").unwrap();
        remove_stale_temps(dir.path());
        assert!(std::fs::read_dir(dir.path()).unwrap().next().is_none());
    }

    #[test]
    fn damage_is_detected_not_misread() {
        let bytes = encode(&filled_shard().image());
        for cut in [0, 5, 20, bytes.len() / 2, bytes.len() - 1] {
            assert!(decode(&bytes[..cut]).is_err(), "truncated at {cut}");
        }
        for flip in [8, 30, bytes.len() / 3, bytes.len() - 6] {
            let mut bad = bytes.clone();
            bad[flip] ^= 0x40;
            assert!(decode(&bad).is_err(), "bit flip at {flip}");
        }
        assert!(decode(&bytes).is_ok());
    }

    #[test]
    fn a_changed_definition_is_reported_not_forced() {
        let image = filled_shard().image();
        let mut changed = vec![checkout_copy()];
        changed[0].variants.swap(0, 1);
        let defs: Vec<_> = changed.into_iter().map(Arc::new).collect();
        let (shard, mismatches) = Shard::from_image(&defs, image);
        assert_eq!(mismatches.len(), 1);
        assert!(
            mismatches[0].to_string().contains("variants"),
            "{}",
            mismatches[0]
        );
        assert!(shard
            .engine()
            .experiment("crumb-checkout-copy")
            .unwrap()
            .snapshot()
            .is_empty());
    }
}
