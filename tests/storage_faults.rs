//! Storage faults against the real binary: the state directory on a small tmpfs that fills
//! up or is remounted read-only while events are posted, files damaged while the service is
//! stopped, and the process SIGKILLed at each step of a write (the test hook
//! `POSTERIORD_TEST_CRASH_AT`, see `service::store::crash_point`). After each, the totals
//! must equal exactly the expected totals of the acknowledged requests, computed by the
//! independent model in tests/common — nothing refused applied, nothing applied twice.
//!
//! Mounting needs root (CI runs as root); without it the tmpfs tests print why and pass
//! without checking. The damage and crash-stage tests need no root.

mod common;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Duration;

use common::{signal, wait_exit, wait_for, workload, Service, Workload, TEST_EXPERIMENTS};
use serde_json::Value;

const CONFIG: &str = r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 200
"#;

fn config() -> String {
    format!("{CONFIG}{TEST_EXPERIMENTS}")
}

fn is_root() -> bool {
    // SAFETY: geteuid has no preconditions.
    unsafe { libc::geteuid() == 0 }
}

/// A tmpfs of `size` mounted on a fresh directory, unmounted on drop.
struct Tmpfs {
    dir: tempfile::TempDir,
}

impl Tmpfs {
    fn mount(size: &str) -> Tmpfs {
        let dir = tempfile::tempdir().unwrap();
        run(
            "mount",
            &["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"],
            dir.path(),
        );
        Tmpfs { dir }
    }
    fn path(&self) -> &Path {
        self.dir.path()
    }
    fn remount(&self, mode: &str) {
        // A save in progress holds a file open for writing, which makes a read-only remount
        // fail with EBUSY for a moment: try again.
        for _ in 0..50 {
            let ok = Command::new("mount")
                .args(["-o", &format!("remount,{mode}")])
                .arg(self.path())
                .status()
                .unwrap()
                .success();
            if ok {
                return;
            }
            std::thread::sleep(Duration::from_millis(20));
        }
        panic!("cannot remount {} {mode}", self.path().display());
    }
    /// Fill every free byte with a file `filler` (the service's own writes then fail).
    fn fill(&self) {
        use std::io::Write;
        let mut f = std::fs::File::create(self.path().join("filler")).unwrap();
        let chunk = vec![7u8; 4096];
        while f.write_all(&chunk).is_ok() {}
        let _ = f.sync_all();
        // Bytes smaller than a page may still fit: take them too.
        while f.write_all(&[7u8]).is_ok() {}
    }
    fn unfill(&self) {
        std::fs::remove_file(self.path().join("filler")).unwrap();
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(self.path()).status();
    }
}

fn run(cmd: &str, args: &[&str], last: &Path) {
    let ok = Command::new(cmd)
        .args(args)
        .arg(last)
        .status()
        .unwrap()
        .success();
    assert!(ok, "{cmd} {args:?} {} failed", last.display());
}

/// Requests of `size` lines each (NDJSON bodies), with their line ranges.
fn requests(w: &Workload, size: usize) -> Vec<(std::ops::Range<usize>, String)> {
    (0..w.lines.len())
        .step_by(size)
        .map(|start| {
            let end = (start + size).min(w.lines.len());
            (start..end, w.lines[start..end].join("\n"))
        })
        .collect()
}

/// The requests acknowledged so far, by line.
struct Acked(Vec<bool>);

impl Acked {
    fn new(w: &Workload) -> Acked {
        Acked(vec![false; w.lines.len()])
    }
    fn mark(&mut self, range: std::ops::Range<usize>) {
        for i in range {
            self.0[i] = true;
        }
    }
    fn expected(&self, w: &Workload) -> Vec<common::Expected> {
        w.expected_of(|i| self.0[i])
    }
}

/// POST one request; `Some(true)` if acknowledged, `Some(false)` if refused as not durable,
/// `None` if the connection broke (the process died).
fn post(service: &Service, body: &str) -> Option<bool> {
    let r = common::client()
        .post(service.url("/v1/events"))
        .body(body.to_string())
        .send()
        .ok()?;
    let status = r.status().as_u16();
    let doc: Value = r.json().unwrap_or(Value::Null);
    match status {
        200 => Some(true),
        503 => {
            assert_eq!(doc["error"]["code"], "not_durable", "{doc}");
            Some(false)
        }
        _ => panic!("unexpected reply {status}: {doc}"),
    }
}

/// The API's totals equal `expected`: readers may be served a summary up to a second old
/// (`service::readings::MAX_AGE`), so wait that out before comparing.
fn assert_exact(service: &Service, expected: &[common::Expected]) {
    let deadline = std::time::Instant::now() + Duration::from_secs(3);
    while std::time::Instant::now() < deadline {
        let now: Vec<_> = common::SPECS
            .iter()
            .map(|s| common::observed(service, s))
            .collect();
        if now == expected {
            return;
        }
        std::thread::sleep(Duration::from_millis(200));
    }
    common::assert_exact(service, expected);
}

fn kill(service: &mut Service) {
    signal(service.child.id(), "KILL");
    wait_exit(&mut service.child, Duration::from_secs(10)).expect("killed process exits");
}

fn store_status(service: &Service) -> (u16, Value) {
    let (status, doc) = service.get("/readyz");
    (status, doc["checks"]["store"].clone())
}

fn wait_not_durable(service: &Service) {
    wait_for(
        Duration::from_secs(10),
        "readiness to report the store",
        || {
            let (status, store) = store_status(service);
            (status == 503 && store["status"] == "not_durable").then_some(())
        },
    );
    let metrics = service.get_text("/metrics").1;
    assert!(
        metrics.contains("\nposteriord_state_durable 0\n"),
        "gauge not 0:\n{metrics}"
    );
}

fn wait_durable(service: &Service) {
    wait_for(Duration::from_secs(10), "readiness to return", || {
        let (status, store) = store_status(service);
        (status == 200 && store["status"] == "writable").then_some(())
    });
    let metrics = service.get_text("/metrics").1;
    assert!(metrics.contains("\nposteriord_state_durable 1\n"));
}

#[test]
fn a_full_disk_refuses_requests_whole_and_a_restart_needs_no_free_space() {
    if !is_root() {
        eprintln!("SKIPPED: mounting a tmpfs needs root (CI runs as root)");
        return;
    }
    let fs = Tmpfs::mount("1m");
    let state = fs.path().join("state");
    let w = workload(2201, 4_000);
    let reqs = requests(&w, 200);
    let mut acked = Acked::new(&w);
    let mut service = Service::start_in(&config(), Some(&state), &[]);
    let mut next = 0;
    while next < 6 {
        assert_eq!(post(&service, &reqs[next].1), Some(true));
        acked.mark(reqs[next].0.clone());
        next += 1;
    }
    fs.fill();
    // Writes now fail part-way: each refused request must be cut off the log whole.
    for _ in 0..3 {
        assert_eq!(post(&service, &reqs[next].1), Some(false));
    }
    wait_not_durable(&service);
    let (_, store) = store_status(&service);
    assert!(
        store["failing"].to_string().contains("No space left"),
        "{store}"
    );
    assert_exact(&service, &acked.expected(&w));
    kill(&mut service);
    // Restart on the still-full disk: the log is read where it is, nothing is copied.
    let mut service = Service::start_in(&config(), Some(&state), &[]);
    assert_exact(&service, &acked.expected(&w));
    wait_not_durable(&service);
    assert_eq!(post(&service, &reqs[next].1), Some(false));
    fs.unfill();
    wait_durable(&service);
    while next < reqs.len() {
        assert_eq!(post(&service, &reqs[next].1), Some(true), "request {next}");
        acked.mark(reqs[next].0.clone());
        next += 1;
    }
    assert_exact(&service, &w.expected);
    kill(&mut service);
    let service = Service::start_in(&config(), Some(&state), &[]);
    assert_exact(&service, &w.expected);
    assert!(!acked.0.contains(&false));
}

#[test]
fn a_read_only_remount_refuses_writes_until_it_is_writable_again() {
    if !is_root() {
        eprintln!("SKIPPED: mounting a tmpfs needs root (CI runs as root)");
        return;
    }
    let fs = Tmpfs::mount("16m");
    let state = fs.path().join("state");
    let w = workload(2202, 2_000);
    let reqs = requests(&w, 250);
    let mut service = Service::start_in(&config(), Some(&state), &[]);
    for r in &reqs[..4] {
        assert_eq!(post(&service, &r.1), Some(true));
    }
    fs.remount("ro");
    assert_eq!(post(&service, &reqs[4].1), Some(false));
    wait_not_durable(&service);
    let (_, store) = store_status(&service);
    assert!(
        store["failing"].to_string().contains("Read-only"),
        "{store}"
    );
    assert_exact(&service, &w.expected_of(|i| i < 1_000));
    fs.remount("rw");
    wait_durable(&service);
    for r in &reqs[4..] {
        assert_eq!(post(&service, &r.1), Some(true));
    }
    kill(&mut service);
    let service = Service::start_in(&config(), Some(&state), &[]);
    assert_exact(&service, &w.expected);
}

/// A stopped service's state directory: the HTTP shard saved (by a clean stop) with the
/// first `saved` requests, the later ones in the write-ahead log only (SIGKILL; the snapshot
/// interval is an hour, so no save runs between).
fn stopped_state(reqs: &[(std::ops::Range<usize>, String)], saved: usize) -> tempfile::TempDir {
    let dir = tempfile::tempdir().unwrap();
    let state = dir.path().join("state");
    let cfg = config().replace(
        "snapshot_interval_ms = 200",
        "snapshot_interval_ms = 3600000",
    );
    let mut service = Service::start_in(&cfg, Some(&state), &[]);
    for r in &reqs[..saved] {
        assert_eq!(post(&service, &r.1), Some(true));
    }
    assert!(service.terminate(Duration::from_secs(20)).success());
    let mut service = Service::start_in(&cfg, Some(&state), &[]);
    for r in &reqs[saved..] {
        assert_eq!(post(&service, &r.1), Some(true));
    }
    kill(&mut service);
    dir
}

fn copy_dir(from: &Path) -> tempfile::TempDir {
    let to = tempfile::tempdir().unwrap();
    run("cp", &["-a", &format!("{}/.", from.display())], to.path());
    to
}

/// Start and expect failure; the log.
fn start_fails(state: &Path) -> String {
    let scratch = tempfile::tempdir().unwrap();
    let cfg = scratch.path().join("p.toml");
    std::fs::write(&cfg, config()).unwrap();
    let out = Command::new(common::bin())
        .args(["serve", "--config"])
        .arg(&cfg)
        .env("POSTERIORD_STORE_DIR", state)
        .output()
        .unwrap();
    assert!(!out.status.success(), "started on a damaged directory");
    String::from_utf8_lossy(&out.stderr).into_owned()
}

fn segment(state: &Path) -> PathBuf {
    let mut segs: Vec<PathBuf> = std::fs::read_dir(state.join("shards"))
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().contains("http.wal."))
        .collect();
    segs.sort();
    segs.pop().expect("a log segment")
}

#[test]
fn files_damaged_while_stopped_are_named_with_their_fix_and_nothing_is_misapplied() {
    let w = workload(2203, 1_200);
    let reqs = requests(&w, 100);
    // Requests 0..6 in the saved shard, 6..12 in the log (one segment, one record each).
    let base = stopped_state(&reqs, 6);
    let state_of = |d: &tempfile::TempDir| d.path().join("state");

    // A bit flipped inside the log: start refuses, naming the file and the cut that fixes it.
    let d = copy_dir(base.path());
    let seg = segment(&state_of(&d));
    let mut bytes = std::fs::read(&seg).unwrap();
    let mid = bytes.len() / 2;
    bytes[mid] ^= 0x04;
    std::fs::write(&seg, &bytes).unwrap();
    let err = start_fails(&state_of(&d));
    assert!(
        err.contains(&seg.display().to_string()) && err.contains("truncate -s"),
        "{err}"
    );
    let at: u64 = err
        .split("truncate -s ")
        .nth(1)
        .unwrap()
        .split(' ')
        .next()
        .unwrap()
        .parse()
        .unwrap();
    // Records are whole requests: applying the fix keeps the requests before the damage.
    let f = std::fs::OpenOptions::new().write(true).open(&seg).unwrap();
    f.set_len(at).unwrap();
    drop(f);
    let service = Service::start_in(&config(), Some(&state_of(&d)), &[]);
    let applied = common::total_seen(&service);
    let whole = reqs.iter().scan(0u64, |n, r| {
        *n += r.0.len() as u64;
        Some(*n)
    });
    let n_requests = whole.take_while(|n| *n <= applied).count();
    assert!((6..12).contains(&n_requests), "{n_requests} requests kept");
    assert_exact(&service, &w.expected_of(|i| i < reqs[n_requests - 1].0.end));
    drop(service);

    // The log cut inside its last record (as a crash mid-append leaves it): start succeeds
    // without that request, and says so.
    let d = copy_dir(base.path());
    let seg = segment(&state_of(&d));
    let len = std::fs::metadata(&seg).unwrap().len();
    let f = std::fs::OpenOptions::new().write(true).open(&seg).unwrap();
    f.set_len(len - 10).unwrap();
    drop(f);
    let service = Service::start_in(&config(), Some(&state_of(&d)), &[]);
    assert_exact(&service, &w.expected_of(|i| i < reqs[11].0.start));
    assert!(
        service.log_text().contains("partial record"),
        "{}",
        service.log_text()
    );
    drop(service);

    // The saved shard truncated or bit-flipped: start refuses, naming it and the fix.
    for damage in ["truncate", "flip"] {
        let d = copy_dir(base.path());
        let shard = state_of(&d).join("shards/http.state");
        let mut bytes = std::fs::read(&shard).unwrap();
        if damage == "truncate" {
            bytes.truncate(bytes.len() / 2);
        } else {
            let i = bytes.len() / 3;
            bytes[i] ^= 0x01;
        }
        std::fs::write(&shard, &bytes).unwrap();
        let err = start_fails(&state_of(&d));
        assert!(
            err.contains(&shard.display().to_string()) && err.contains("Fix:"),
            "{err}"
        );
        // The fix as stated: move it aside; the log's requests alone are then counted.
        std::fs::rename(&shard, shard.with_extension("state.damaged")).unwrap();
        let service = Service::start_in(&config(), Some(&state_of(&d)), &[]);
        assert_exact(&service, &w.expected_of(|i| i >= reqs[6].0.start));
    }

    // The alert file and the catalog truncated: start refuses, naming each and its fix.
    for (file, text) in [
        ("alerts.json", r#"{"version":1,"alerts":[{"id":"#),
        ("experiments.json", r#"{"version":1,"experiments":["#),
    ] {
        let d = copy_dir(base.path());
        let path = state_of(&d).join(file);
        std::fs::write(&path, text).unwrap();
        let err = start_fails(&state_of(&d));
        assert!(
            err.contains(&path.display().to_string()) && err.contains("Fix:"),
            "{err}"
        );
        std::fs::rename(&path, path.with_extension("json.damaged")).unwrap();
        let service = Service::start_in(&config(), Some(&state_of(&d)), &[]);
        assert_exact(&service, &w.expected);
    }

    // The undamaged copy counts every acknowledged request once.
    let service = Service::start_in(&config(), Some(&state_of(&base)), &[]);
    assert_exact(&service, &w.expected);
}

#[test]
fn a_sigkill_at_each_step_of_a_write_loses_nothing_acknowledged_and_applies_nothing_twice() {
    let w = workload(2204, 1_000);
    let reqs = requests(&w, 100);
    // (stage, whether the request in flight is in the log afterwards)
    let stages = [
        ("wal-partial", false),
        ("wal-written", true),
        ("wal-synced", true),
        ("save-tmp-written@http.state", true),
        ("save-tmp-synced@http.state", true),
        ("save-renamed@http.state", true),
        ("save-done", true),
    ];
    for (stage, in_flight_kept) in stages {
        let scratch = tempfile::tempdir().unwrap();
        let state = scratch.path().join("state");
        // Four requests acknowledged and saved by a clean stop.
        let mut service = Service::start_in(&config(), Some(&state), &[]);
        for r in &reqs[..4] {
            assert_eq!(post(&service, &r.1), Some(true));
        }
        assert!(service.terminate(Duration::from_secs(20)).success());
        let mut service = Service::start_in(
            &config(),
            Some(&state),
            &[("POSTERIORD_TEST_CRASH_AT", stage)],
        );
        let answer = post(&service, &reqs[4].1);
        if stage.starts_with("wal") {
            assert_eq!(answer, None, "{stage}: the process should die mid-request");
        } else {
            // Logged and applied; the next save of the HTTP shard reaches the stage, which may
            // come before the reply has left.
            assert_ne!(answer, Some(false), "{stage}");
        }
        let status = wait_exit(&mut service.child, Duration::from_secs(10))
            .unwrap_or_else(|| panic!("{stage}: the process did not stop itself"));
        assert!(!status.success());
        assert!(
            service.log_text().contains("POSTERIORD_TEST_CRASH_AT"),
            "{stage}"
        );
        let service = Service::start_in(&config(), Some(&state), &[]);
        let upto = if in_flight_kept { 5 } else { 4 };
        let expected = w.expected_of(|i| i < reqs[upto - 1].0.end);
        assert_exact(&service, &expected);
        // Later requests continue the sequence: none is taken for one already applied.
        assert_eq!(post(&service, &reqs[5].1), Some(true), "{stage}");
        let mut service = service;
        kill(&mut service);
        let service = Service::start_in(&config(), Some(&state), &[]);
        assert_exact(
            &service,
            &w.expected_of(|i| i < reqs[upto - 1].0.end || reqs[5].0.contains(&i)),
        );
        eprintln!("{stage}: exact after the crash and after a further restart");
    }
}

#[test]
fn a_full_disk_during_kafka_consumption_keeps_the_offsets_and_the_state_together() {
    if !is_root() {
        eprintln!("SKIPPED: mounting a tmpfs needs root (CI runs as root)");
        return;
    }
    let brokers = common::kafka::brokers();
    let topic = common::kafka::unique("storage-events");
    let group = common::kafka::unique("storage-group");
    let fs = Tmpfs::mount("2m");
    let state = fs.path().join("state");
    let scratch = tempfile::tempdir().unwrap();
    let w = workload(2205, 9_000);
    let cfg = format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 200
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
changelog_interval_ms = 300
[kafka.properties]
"session.timeout.ms" = 6000
"heartbeat.interval.ms" = 1000
{TEST_EXPERIMENTS}"#
    );
    let produce = |lines: &[String]| {
        assert_eq!(
            common::kafka::produce(&brokers, &topic, 3, lines, scratch.path()),
            lines.len()
        );
    };
    let counted = |service: &Service, n: usize| {
        wait_for(Duration::from_secs(120), "the events to be counted", || {
            (common::total_seen(service) == n as u64).then_some(())
        });
    };
    // The changelog topic, made by the independent client with a message limit far below a
    // partition image, so every publication is refused by the broker until it is raised.
    let changelog = format!("{group}-changelog");
    changelog_limit(&brokers, &changelog, 1024);
    produce(&w.lines[..3_000]);
    let mut service = Service::start_in(&cfg, Some(&state), &[]);
    counted(&service, 3_000);
    wait_for(
        Duration::from_secs(20),
        "a refused changelog publication",
        || {
            (service.metric_sum("posteriord_changelog_publishes_total", "result=\"error\"") > 0)
                .then_some(())
        },
    );
    fs.fill();
    // Consumed and applied in memory, but neither these events nor their offsets can be
    // saved: readiness says so, and a restart must read them again (once).
    produce(&w.lines[3_000..6_000]);
    counted(&service, 6_000);
    wait_not_durable(&service);
    let (_, store) = store_status(&service);
    assert!(
        store["failing"]
            .to_string()
            .contains("state of shard kafka/"),
        "{store}"
    );
    assert_exact(&service, &w.expected_of(|i| i < 6_000));
    kill(&mut service);
    // A restart on the still-full disk restores each partition from its file or the
    // changelog and re-reads from the stored offset: nothing counted twice.
    let mut service = Service::start_in(&cfg, Some(&state), &[]);
    counted(&service, 6_000);
    assert_exact(&service, &w.expected_of(|i| i < 6_000));
    fs.unfill();
    wait_durable(&service);
    changelog_limit(&brokers, &changelog, 8 << 20);
    produce(&w.lines[6_000..]);
    counted(&service, 9_000);
    wait_for(Duration::from_secs(30), "a changelog publication", || {
        (service.metric_sum("posteriord_changelog_publishes_total", "result=\"ok\"") > 0)
            .then_some(())
    });
    kill(&mut service);
    let service = Service::start_in(&cfg, Some(&state), &[]);
    counted(&service, 9_000);
    std::thread::sleep(Duration::from_secs(1));
    assert_exact(&service, &w.expected);
}

fn put_definition(service: &Service, id: &str) -> Option<(u16, Value)> {
    let body = serde_json::json!({
        "variants": [{"name": "control"}, {"name": "pear"}],
        "metric": [{"name": "sprouted", "kind": "conversion"}],
    });
    let r = common::client()
        .put(service.url(&format!("/v1/experiments/{id}")))
        .header("content-type", "application/json")
        .body(body.to_string())
        .send()
        .ok()?;
    let status = r.status().as_u16();
    Some((status, r.json().unwrap_or(Value::Null)))
}

#[test]
fn a_definition_is_kept_whole_or_not_at_all_after_a_crash_or_a_full_disk() {
    // SIGKILL at each step of replacing experiments.json: after the rename the definition
    // holds, before it the old catalog does; either way the service starts.
    for (stage, kept) in [
        ("save-tmp-written@experiments.json", false),
        ("save-tmp-synced@experiments.json", false),
        ("save-renamed@experiments.json", true),
    ] {
        let scratch = tempfile::tempdir().unwrap();
        let state = scratch.path().join("state");
        let mut service = Service::start_in(
            &config(),
            Some(&state),
            &[("POSTERIORD_TEST_CRASH_AT", stage)],
        );
        assert!(
            put_definition(&service, "orchard-pear").is_none(),
            "{stage}"
        );
        wait_exit(&mut service.child, Duration::from_secs(10)).expect("stopped itself");
        let service = Service::start_in(&config(), Some(&state), &[]);
        let (status, _) = service.get("/v1/experiments/orchard-pear");
        assert_eq!(status == 200, kept, "{stage}: status {status}");
        assert!(
            std::fs::read_dir(&state).unwrap().all(|e| !e
                .unwrap()
                .path()
                .to_string_lossy()
                .ends_with(".tmp")),
            "{stage}: a temporary file was left"
        );
        let (status, doc) = put_definition(&service, "orchard-pear").unwrap();
        assert!(status == 200 || status == 201, "{stage}: {status} {doc}");
    }
    if !is_root() {
        eprintln!("SKIPPED (full-disk part): mounting a tmpfs needs root (CI runs as root)");
        return;
    }
    let fs = Tmpfs::mount("1m");
    let state = fs.path().join("state");
    let mut service = Service::start_in(&config(), Some(&state), &[]);
    fs.fill();
    let (status, doc) = put_definition(&service, "orchard-pear").unwrap();
    assert_eq!(
        (status, doc["error"]["code"].as_str()),
        (503, Some("not_durable")),
        "{doc}"
    );
    assert_eq!(service.get("/v1/experiments/orchard-pear").0, 404);
    wait_not_durable(&service);
    kill(&mut service);
    let service = Service::start_in(&config(), Some(&state), &[]);
    assert_eq!(service.get("/v1/experiments/orchard-pear").0, 404);
    // Nothing else writes now: the periodic probe alone finds the full disk.
    wait_not_durable(&service);
    fs.unfill();
    let (status, doc) = put_definition(&service, "orchard-pear").unwrap();
    assert_eq!(status, 201, "{doc}");
    wait_durable(&service);
}

/// Create (if needed) the compacted topic `topic` and set its largest message to `bytes`,
/// with the independent client (Python confluent-kafka's admin API).
fn changelog_limit(brokers: &str, topic: &str, bytes: u32) {
    let script = r#"
import sys
from confluent_kafka.admin import AdminClient, NewTopic, ConfigResource
brokers, topic, limit = sys.argv[1], sys.argv[2], sys.argv[3]
admin = AdminClient({"bootstrap.servers": brokers})
config = {"cleanup.policy": "compact", "max.message.bytes": limit}
if topic not in admin.list_topics(timeout=10).topics:
    for f in admin.create_topics([NewTopic(topic, 3, 1, config=config)]).values():
        f.result()
else:
    for f in admin.alter_configs([ConfigResource("topic", topic, set_config=config)]).values():
        f.result()
"#;
    let out = Command::new("python3")
        .args(["-c", script, brokers, topic, &bytes.to_string()])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}
