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

use crate::event::Outcome;
use crate::experiment::{ExperimentDef, ExposureBasis, MetricKind};
use crate::state::image::{ExperimentImage, ImageMismatch, UnitRecord};
use crate::state::shards::{Shard, ShardImage};
use crate::state::{ConversionTotals, DefectTotals, MetricTotals, OutcomeCounts};

const MAGIC: &[u8; 8] = b"PSTDSHRD";
const VERSION: u32 = 2;
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
        let (shard, mismatches) = Shard::from_image(defs, image);
        Ok(Some(Loaded { shard, mismatches }))
    }
}

/// Replace the file at `path` with `bytes` atomically: write a temporary file beside it,
/// fsync, rename over, fsync the directory. After a crash the file holds the old or the new
/// bytes, never a mix.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> Result<(), StoreError> {
    write_atomic_with(path, |w| w.write_all(bytes))
}

/// [`write_atomic`] with the content streamed by `write` through a buffer, so a large state
/// is never held twice in memory (encoded and live).
fn write_atomic_with(
    path: &Path,
    write: impl FnOnce(&mut io::BufWriter<File>) -> io::Result<()>,
) -> Result<(), StoreError> {
    let mut tmp = path.as_os_str().to_owned();
    tmp.push(".tmp");
    let tmp = PathBuf::from(tmp);
    {
        let f = File::create(&tmp).map_err(io_err(&tmp))?;
        let mut w = io::BufWriter::with_capacity(1 << 20, f);
        write(&mut w).map_err(io_err(&tmp))?;
        let f = w
            .into_inner()
            .map_err(io::IntoInnerError::into_error)
            .map_err(io_err(&tmp))?;
        f.sync_all().map_err(io_err(&tmp))?;
    }
    fs::rename(&tmp, path).map_err(io_err(path))?;
    // The rename is durable only once the directory entry is.
    let dir = path.parent().unwrap_or(Path::new("."));
    File::open(dir)
        .and_then(|d| d.sync_all())
        .map_err(io_err(dir))?;
    Ok(())
}

/// One logged event: its sequence number and encoded bytes.
pub type WalRecord = (u64, Vec<u8>);

/// Write-ahead log for events that arrive without an input log of their own (HTTP ingest):
/// each record is appended and fsynced before its event is applied, so an accepted event
/// survives a crash; records already in the shard's stored state are dropped after each save.
///
/// Record: `u64 sequence | u32 length | bytes | u32 CRC-32 of the previous fields`. A torn
/// record at the end (a crash mid-append) is detected by length or CRC and cut off.
#[derive(Debug)]
pub struct Wal {
    path: PathBuf,
    file: File,
}

impl Wal {
    /// Open (creating) the log `name` in the store.
    pub fn open(store: &Store, name: &str) -> Result<Wal, StoreError> {
        let path = store.dir.join(format!("{name}.wal"));
        let file = fs::OpenOptions::new()
            .create(true)
            .append(true)
            .open(&path)
            .map_err(io_err(&path))?;
        Ok(Wal { path, file })
    }

    fn record(seq: u64, bytes: &[u8], out: &mut Vec<u8>) {
        let start = out.len();
        out.extend_from_slice(&seq.to_le_bytes());
        out.extend_from_slice(&(bytes.len() as u32).to_le_bytes());
        out.extend_from_slice(bytes);
        let crc = crc32fast::hash(&out[start..]);
        out.extend_from_slice(&crc.to_le_bytes());
    }

    /// Append `items` with sequence numbers from `first_seq` and make them durable.
    pub fn append(&mut self, first_seq: u64, items: &[&[u8]]) -> Result<(), StoreError> {
        let mut buf = Vec::with_capacity(items.iter().map(|b| b.len() + 16).sum());
        for (i, bytes) in items.iter().enumerate() {
            Wal::record(first_seq + i as u64, bytes, &mut buf);
        }
        self.file.write_all(&buf).map_err(io_err(&self.path))?;
        self.file.sync_data().map_err(io_err(&self.path))
    }

    /// Every intact record, in order; a damaged tail is reported in the second value.
    pub fn read(&self) -> Result<(Vec<WalRecord>, bool), StoreError> {
        let bytes = fs::read(&self.path).map_err(io_err(&self.path))?;
        let mut records = Vec::new();
        let mut pos = 0;
        while pos < bytes.len() {
            let Some(header) = bytes.get(pos..pos + 12) else {
                return Ok((records, true));
            };
            let seq = u64::from_le_bytes(header[..8].try_into().expect("8 bytes"));
            let len = u32::from_le_bytes(header[8..12].try_into().expect("4 bytes")) as usize;
            let end = pos + 12 + len;
            let Some(crc_bytes) = bytes.get(end..end + 4) else {
                return Ok((records, true));
            };
            let crc = u32::from_le_bytes(crc_bytes.try_into().expect("4 bytes"));
            if crc32fast::hash(&bytes[pos..end]) != crc {
                return Ok((records, true));
            }
            records.push((seq, bytes[pos + 12..end].to_vec()));
            pos = end + 4;
        }
        Ok((records, false))
    }

    /// Keep only records with sequence ≥ `from` (the rest are in the stored state).
    pub fn truncate_before(&mut self, from: u64) -> Result<(), StoreError> {
        let (records, _) = self.read()?;
        let mut buf = Vec::new();
        for (seq, bytes) in records.iter().filter(|(seq, _)| *seq >= from) {
            Wal::record(*seq, bytes, &mut buf);
        }
        let tmp = self.path.with_extension("wal.tmp");
        {
            let mut f = File::create(&tmp).map_err(io_err(&tmp))?;
            f.write_all(&buf).map_err(io_err(&tmp))?;
            f.sync_all().map_err(io_err(&tmp))?;
        }
        fs::rename(&tmp, &self.path).map_err(io_err(&self.path))?;
        self.file = fs::OpenOptions::new()
            .append(true)
            .open(&self.path)
            .map_err(io_err(&self.path))?;
        Ok(())
    }
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
    let mut w = Writer::new(out);
    w.put(MAGIC);
    w.u32(VERSION);
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
    if version != VERSION {
        return Err(format!(
            "format version {version}; this build reads {VERSION}"
        ));
    }
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
        });
    }
    if r.pos != body.len() {
        return Err(format!("{} unexpected trailing bytes", body.len() - r.pos));
    }
    Ok(ShardImage {
        next_offset,
        experiments,
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::event::{Event, EventBody};
    use std::borrow::Cow;

    /// The experiment these tests count, defined as over the API.
    fn checkout_copy() -> ExperimentDef {
        crate::config::experiment_from_json(
            "crumb-checkout-copy",
            &serde_json::json!({
                "variants": [{"name": "control"}, {"name": "short-copy"}],
                "metric": [{"name": "purchase", "kind": "conversion"},
                           {"name": "payment-error", "kind": "defect_rate", "exposure": "reported"}]
            }),
        )
        .unwrap()
    }

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

    #[test]
    fn the_wal_keeps_records_and_cuts_a_torn_tail() {
        let dir = tempfile::tempdir().unwrap();
        let store = Store::open(dir.path()).unwrap();
        let mut wal = Wal::open(&store, "http").unwrap();
        wal.append(0, &[b"one", b"two"]).unwrap();
        wal.append(2, &[b"three"]).unwrap();
        let (records, torn) = wal.read().unwrap();
        assert!(!torn);
        assert_eq!(
            records.iter().map(|(s, _)| *s).collect::<Vec<_>>(),
            vec![0, 1, 2]
        );
        assert_eq!(records[2].1, b"three");
        wal.truncate_before(2).unwrap();
        wal.append(3, &[b"four"]).unwrap();
        let (records, _) = wal.read().unwrap();
        assert_eq!(
            records.iter().map(|(s, _)| *s).collect::<Vec<_>>(),
            vec![2, 3]
        );
        // A crash mid-append leaves a partial record: it is detected, the rest kept.
        let path = dir.path().join("shards/http.wal");
        let mut bytes = std::fs::read(&path).unwrap();
        bytes.extend_from_slice(&[9, 0, 0, 0, 0, 0, 0, 0, 50, 0]);
        std::fs::write(&path, &bytes).unwrap();
        let (records, torn) = Wal::open(&store, "http").unwrap().read().unwrap();
        assert!(torn);
        assert_eq!(records.len(), 2);
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
