//! Kafka helpers shared by the broker tests: the broker address that tests/run.sh exports,
//! unique names, and the independent Python client (tests/tools/produce.py, consume.py).

use std::path::Path;
use std::process::{Child, Command, Stdio};
use std::time::{SystemTime, UNIX_EPOCH};

use serde_json::Value;

/// The loopback broker started by tests/run.sh.
pub fn brokers() -> String {
    std::env::var("POSTERIORD_TEST_BROKERS").unwrap_or_else(|_| {
        panic!(
            "POSTERIORD_TEST_BROKERS is not set: run the suite with tests/run.sh, which starts a \
             Kafka-protocol broker on loopback and sets it"
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
    let file = dir.join(format!("{topic}-{}.ndjson", lines.len()));
    std::fs::write(&file, lines.join("\n") + "\n").unwrap();
    Command::new("python3")
        .arg(tool("produce.py"))
        .args([
            "--brokers",
            brokers,
            "--topic",
            topic,
            "--partitions",
            &partitions.to_string(),
        ])
        .arg(&file)
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

/// Read `count` messages of `topic` from the beginning with the independent client.
pub fn consume(brokers: &str, topic: &str, count: usize) -> Vec<Value> {
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
            "60",
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
