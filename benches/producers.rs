//! What Apache Kafka's transactions would cost posteriord's producers, measured beside what
//! they use today (idempotent producers) in the same run: one changelog publication (a 1 MiB
//! partition image in two 512 KiB chunks, then a flush) and one alert (a 1 KiB CloudEvent,
//! then a flush), each either sent by the idempotent producer or wrapped in a transaction.
//! The decision this informs is recorded in docs/architecture.md.
//!
//! `cargo bench --bench producers` measures; under `cargo test --all-targets` it runs at a
//! small scale and checks that both paths deliver what a `read_committed` reader sees.
//! `POSTERIORD_BENCH_BROKERS` names a broker (else `POSTERIORD_TEST_BROKERS`, else a one-node
//! Apache Kafka is started with tests/kafka/broker.sh).

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

use rdkafka::consumer::{BaseConsumer, Consumer};
use rdkafka::producer::{BaseRecord, DefaultProducerContext, Producer, ThreadedProducer};
use rdkafka::{ClientConfig, Message};

type Threaded = ThreadedProducer<DefaultProducerContext>;

const TIMEOUT: Duration = Duration::from_secs(30);

struct Broker {
    brokers: String,
    started: Option<PathBuf>,
}

impl Drop for Broker {
    fn drop(&mut self) {
        if let Some(dir) = &self.started {
            let _ = Command::new(script()).arg("stop").arg(dir).status();
        }
    }
}

fn script() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/kafka/broker.sh")
}

fn broker(work: &Path) -> Broker {
    if let Ok(b) = std::env::var("POSTERIORD_BENCH_BROKERS")
        .or_else(|_| std::env::var("POSTERIORD_TEST_BROKERS"))
    {
        return Broker {
            brokers: b,
            started: None,
        };
    }
    let dir = work.join("kafka");
    let out = Command::new(script())
        .arg("start")
        .arg(&dir)
        .arg("1")
        .stderr(Stdio::inherit())
        .output()
        .expect("tests/kafka/broker.sh (needs java)");
    assert!(out.status.success(), "could not start Apache Kafka");
    Broker {
        brokers: String::from_utf8_lossy(&out.stdout).trim().to_string(),
        started: Some(dir),
    }
}

fn unique(prefix: &str) -> String {
    let nanos = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .unwrap()
        .as_nanos();
    format!("{prefix}-{}-{nanos}", std::process::id())
}

/// posteriord's producer settings (src/kafka.rs `producer_config`, src/changelog.rs).
fn idempotent(brokers: &str) -> Threaded {
    ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("enable.idempotence", "true")
        .set("linger.ms", "5")
        .set("message.max.bytes", "2000000")
        .create()
        .expect("idempotent producer")
}

fn transactional(brokers: &str) -> Threaded {
    let p: Threaded = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("enable.idempotence", "true")
        .set("linger.ms", "5")
        .set("message.max.bytes", "2000000")
        .set("transactional.id", unique("posteriord-bench-tx"))
        .create()
        .expect("transactional producer");
    p.init_transactions(TIMEOUT).expect("init_transactions");
    p
}

/// Send `payloads` to `topic` and wait for them, inside a transaction when `tx`.
fn publish(p: &Threaded, tx: bool, topic: &str, key: &str, payloads: &[&[u8]]) {
    if tx {
        p.begin_transaction().expect("begin");
    }
    for payload in payloads {
        let mut record = BaseRecord::<str, [u8]>::to(topic).key(key).payload(payload);
        loop {
            match p.send(record) {
                Ok(()) => break,
                Err((_, r)) => {
                    record = r;
                    std::thread::sleep(Duration::from_millis(1));
                }
            }
        }
    }
    if tx {
        p.commit_transaction(TIMEOUT).expect("commit");
    } else {
        p.flush(TIMEOUT).expect("flush");
    }
}

/// Median and 90th percentile of `rounds` timed publications, in milliseconds.
fn time_it(rounds: usize, mut f: impl FnMut()) -> (f64, f64) {
    f(); // connections and metadata are not what is measured
    let mut ms: Vec<f64> = (0..rounds)
        .map(|_| {
            let t = Instant::now();
            f();
            t.elapsed().as_secs_f64() * 1e3
        })
        .collect();
    ms.sort_by(f64::total_cmp);
    (ms[ms.len() / 2], ms[ms.len() * 9 / 10])
}

/// Messages of `topic` that a `read_committed` reader sees.
fn committed_count(brokers: &str, topic: &str, expect: usize) -> usize {
    let c: BaseConsumer = ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", unique("bench-reader"))
        .set("auto.offset.reset", "earliest")
        .set("isolation.level", "read_committed")
        .set("enable.auto.commit", "false")
        .create()
        .expect("reader");
    c.subscribe(&[topic]).expect("subscribe");
    let deadline = Instant::now() + TIMEOUT;
    let mut n = 0;
    while n < expect && Instant::now() < deadline {
        if let Some(Ok(m)) = c.poll(Duration::from_millis(200)) {
            if m.payload().is_some() {
                n += 1;
            }
        }
    }
    n
}

fn main() {
    let bench = std::env::args().any(|a| a == "--bench");
    let rounds = |full: usize| if bench { full } else { 3 };
    let work = tempfile::tempdir().expect("temporary directory");
    let broker = broker(work.path());
    let brokers = broker.brokers.as_str();
    println!(
        "producer guarantees on {brokers} ({})",
        if bench {
            "measuring"
        } else {
            "smoke run: the figures mean nothing"
        }
    );

    let image = vec![7u8; 1 << 20];
    let chunks: Vec<&[u8]> = image.chunks(512 * 1024).collect();
    let alert = vec![b'a'; 1024];
    let plain = idempotent(brokers);
    let tx = transactional(brokers);
    let mut rows = Vec::new();
    for (what, payloads, n) in [
        (
            "changelog publication (1 MiB, 2 chunks)",
            chunks.clone(),
            rounds(60),
        ),
        ("alert (1 KiB)", vec![alert.as_slice()], rounds(300)),
    ] {
        let t_plain = unique("bench-plain");
        let t_tx = unique("bench-tx");
        let (p50, p90) = time_it(n, || publish(&plain, false, &t_plain, "k", &payloads));
        let (q50, q90) = time_it(n, || publish(&tx, true, &t_tx, "k", &payloads));
        // Every publication reached the topic, committed, in both modes.
        let sent = (n + 1) * payloads.len();
        assert_eq!(
            committed_count(brokers, &t_plain, sent),
            sent,
            "{what}: idempotent"
        );
        assert_eq!(
            committed_count(brokers, &t_tx, sent),
            sent,
            "{what}: transactional"
        );
        rows.push((what, p50, p90, q50, q90));
    }
    println!(
        "\n{:<42} {:>16} {:>16} {:>8}",
        "per publication", "idempotent ms", "transaction ms", "ratio"
    );
    for (what, p50, p90, q50, q90) in rows {
        println!(
            "{what:<42} {:>7.2} (p90 {:>5.1}) {:>7.2} (p90 {:>5.1}) {:>7.2}×",
            p50,
            p90,
            q50,
            q90,
            q50 / p50
        );
    }
}
