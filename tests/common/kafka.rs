//! Kafka helpers shared by the broker tests: the broker address that tests/run.sh exports,
//! private Apache Kafka clusters from tests/kafka/broker.sh, unique names, and the independent
//! Python client (tests/tools/produce.py, consume.py).

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{SystemTime, UNIX_EPOCH};

use serde_json::Value;

/// The loopback Apache Kafka broker started by tests/run.sh (or any broker it was pointed at).
pub fn brokers() -> String {
    std::env::var("POSTERIORD_TEST_BROKERS").unwrap_or_else(|_| {
        panic!(
            "POSTERIORD_TEST_BROKERS is not set: run the suite with tests/run.sh, which starts \
             Apache Kafka on loopback and sets it"
        )
    })
}

/// A name no other test run uses (topics and groups live as long as the broker).
pub fn unique(prefix: &str) -> String {
    let nanos = SystemTime::now()
        .duration_since(UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    format!("{prefix}-{}-{nanos}", std::process::id())
}

fn tool(name: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/tools")
        .join(name)
}

/// Start the independent producer on `lines` (written to a file in `dir`), creating `topic`
/// with `partitions` partitions if needed.
pub fn spawn_producer(
    brokers: &str,
    topic: &str,
    partitions: u32,
    lines: &[String],
    dir: &Path,
) -> Child {
    spawn_keyed_producer(brokers, topic, partitions, None, lines, dir)
}

/// [`spawn_producer`], keying each message by the value at dotted path `key` of its line
/// (unit-keyed topics) instead of by its experiment.
pub fn spawn_keyed_producer(
    brokers: &str,
    topic: &str,
    partitions: u32,
    key: Option<&str>,
    lines: &[String],
    dir: &Path,
) -> Child {
    let file = dir.join(format!("{topic}-{}.ndjson", lines.len()));
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    let mut cmd = Command::new("python3");
    cmd.arg(tool("produce.py")).args([
        "--brokers",
        brokers,
        "--topic",
        topic,
        "--partitions",
        &partitions.to_string(),
    ]);
    if let Some(key) = key {
        cmd.args(["--key", key]);
    }
    cmd.arg(&file)
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("python3 tests/tools/produce.py (confluent-kafka)")
}

/// Produce `lines` with the independent client and wait; returns how many it delivered.
pub fn produce(brokers: &str, topic: &str, partitions: u32, lines: &[String], dir: &Path) -> usize {
    let out = spawn_producer(brokers, topic, partitions, lines, dir)
        .wait_with_output()
        .unwrap();
    assert!(
        out.status.success(),
        "independent producer failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).trim().parse().unwrap()
}

/// [`produce`] keyed by the value at dotted path `key` of each line; returns how many it
/// delivered.
pub fn produce_keyed(
    brokers: &str,
    topic: &str,
    partitions: u32,
    key: &str,
    lines: &[String],
    dir: &Path,
) -> usize {
    let out = spawn_keyed_producer(brokers, topic, partitions, Some(key), lines, dir)
        .wait_with_output()
        .unwrap();
    assert!(
        out.status.success(),
        "independent producer failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).trim().parse().unwrap()
}

/// Read `count` messages of `topic` from the beginning with the independent client.
pub fn consume(brokers: &str, topic: &str, count: usize) -> Vec<Value> {
    consume_within(brokers, topic, count, 60)
}

/// Read up to `count` messages of `topic` from the beginning, waiting at most `timeout_secs`.
pub fn consume_within(brokers: &str, topic: &str, count: usize, timeout_secs: u32) -> Vec<Value> {
    let out = Command::new("python3")
        .arg(tool("consume.py"))
        .args([
            "--brokers",
            brokers,
            "--topic",
            topic,
            "--count",
            &count.to_string(),
            "--timeout",
            &timeout_secs.to_string(),
        ])
        .output()
        .expect("python3 tests/tools/consume.py (confluent-kafka)");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect()
}

/// tests/kafka/broker.sh, the Apache Kafka harness.
pub fn broker_script() -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/kafka/broker.sh")
}

/// A private Apache Kafka cluster (KRaft, combined broker+controller nodes on loopback) that
/// a test may kill, restart or stop; stopped on drop, also when the test fails.
pub struct Cluster {
    dir: tempfile::TempDir,
    bootstrap: String,
    nodes: usize,
}

impl Cluster {
    /// Start `nodes` (1 or 3) nodes; returns once every broker answers metadata requests.
    pub fn start(nodes: usize) -> Cluster {
        let dir = tempfile::tempdir().unwrap();
        let out = Command::new(broker_script())
            .arg("start")
            .arg(dir.path())
            .arg(nodes.to_string())
            .stderr(Stdio::inherit())
            .output()
            .expect("run tests/kafka/broker.sh (needs java and the jars it fetches)");
        assert!(out.status.success(), "tests/kafka/broker.sh start failed");
        let bootstrap = String::from_utf8_lossy(&out.stdout).trim().to_string();
        Cluster {
            dir,
            bootstrap,
            nodes,
        }
    }

    /// The bootstrap list, every node's listener.
    pub fn brokers(&self) -> &str {
        &self.bootstrap
    }

    /// The listener of node `k` (1-based) alone.
    pub fn node_addr(&self, k: usize) -> String {
        self.bootstrap.split(',').nth(k - 1).unwrap().to_string()
    }

    fn script(&self, args: &[&str]) {
        let status = Command::new(broker_script())
            .arg(args[0])
            .arg(self.dir.path())
            .args(&args[1..])
            .status()
            .expect("run tests/kafka/broker.sh");
        assert!(status.success(), "tests/kafka/broker.sh {args:?} failed");
    }

    /// SIGKILL node `k`, as a machine crash would.
    pub fn kill(&self, k: usize) {
        self.script(&["kill", &k.to_string()]);
    }

    /// Start node `k` again on its ports and data, and wait until the cluster answers.
    pub fn restart(&self, k: usize) {
        self.script(&["restart", &k.to_string()]);
        self.script(&["wait"]);
    }

    /// Stop every node gracefully (an outage of the whole cluster).
    pub fn stop_all(&self) {
        self.script(&["stop"]);
    }

    /// Start every node again after `stop_all`.
    pub fn start_all(&self) {
        for k in 1..=self.nodes {
            self.script(&["restart", &k.to_string()]);
        }
        self.script(&["wait"]);
    }

    /// The last lines of node `k`'s log, for failure messages.
    pub fn log_tail(&self, k: usize, lines: usize) -> String {
        let text = std::fs::read_to_string(self.dir.path().join(format!("node-{k}/broker.log")))
            .unwrap_or_default();
        let all: Vec<&str> = text.lines().collect();
        all[all.len().saturating_sub(lines)..].join("\n")
    }
}

impl Drop for Cluster {
    fn drop(&mut self) {
        let _ = Command::new(broker_script())
            .arg("stop")
            .arg(self.dir.path())
            .status();
    }
}

/// A `serve` configuration consuming `topic` as member of `group` on `brokers`: state saved
/// and published to the changelog every 300 ms (so kills land between, during and right after
/// saves), the given session timeout, then `rest` (further sections and the experiments).
pub fn service_config(
    brokers: &str,
    topic: &str,
    group: &str,
    session_timeout_ms: u32,
    rest: &str,
) -> String {
    format!(
        r#"[http]
addr = "127.0.0.1:0"
[store]
snapshot_interval_ms = 300
[kafka]
brokers = "{brokers}"
topics = ["{topic}"]
group = "{group}"
changelog_interval_ms = 300
[kafka.properties]
"session.timeout.ms" = {session_timeout_ms}
"heartbeat.interval.ms" = 1000
{rest}"#
    )
}
