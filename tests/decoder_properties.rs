//! Robustness of the decode → apply path: at least 100,000 random and mutated events (byte
//! flips, truncations, splices, type swaps, huge values) go through the same batch path the
//! sources use. Nothing may panic, every event must end in exactly one outcome or one reject,
//! and every reject must be counted in metrics with a reason and carry a message.

mod common;

use std::sync::Mutex;

use posteriord::config::Config;
use posteriord::event::{Outcome, RejectReason};
use posteriord::service::ingest::{apply_batch, Item};
use posteriord::service::metrics::{Metrics, Source};
use posteriord::state::shards::Shards;
use proptest::prelude::*;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};

fn shards() -> Mutex<Shards> {
    let text = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n{}",
        common::TEST_EXPERIMENTS
    );
    let config = Config::parse(&text, "test", &[]).unwrap();
    Mutex::new(Shards::new(config.experiments))
}

fn mutate(rng: &mut StdRng, line: &str) -> Vec<u8> {
    let mut b = line.as_bytes().to_vec();
    match rng.random_range(0..9) {
        0 => {
            let n = b.len();
            b.truncate(rng.random_range(0..n.max(1)));
        }
        1 => {
            for _ in 0..rng.random_range(1..4) {
                let i = rng.random_range(0..b.len());
                b[i] ^= 1 << rng.random_range(0..8);
            }
        }
        2 => {
            let i = rng.random_range(0..b.len());
            let junk: Vec<u8> = (0..rng.random_range(1..8)).map(|_| rng.random()).collect();
            b.splice(i..i, junk);
        }
        3 => {
            // Swap a string value for a number, a number for a string, or a value for null.
            let s = line
                .replacen("\"control\"", "17", 1)
                .replacen("\"count\":", "\"count\":\"", 1)
                .replacen("\"unit\":\"", "\"unit\":null,\"x\":\"", 1);
            b = s.into_bytes();
        }
        4 => b = line.replacen("\"count\":", "\"count\":-", 1).into_bytes(),
        5 => b = line.replacen("\"type\":\"", "\"type\":\"x", 1).into_bytes(),
        6 => b = line.replacen("2026-05-02T10:00:00Z", "2026-13-45T99:00:00Z", 1).into_bytes(),
        7 => b = format!("{{\"type\":\"tally\",\"experiment\":\"checkout-copy\",\"metric\":\"purchase\",\"variant\":\"control\",\"trials\":{},\"successes\":{}}}", rng.random::<i64>(), rng.random::<i64>()).into_bytes(),
        _ => b = format!("[{line}]").into_bytes(),
    }
    b
}

/// Feed `items` and check the batch-level invariants; returns how many were refused.
fn check_batch(shards: &Mutex<Shards>, metrics: &Metrics, lines: &[Vec<u8>]) -> usize {
    let items: Vec<Item<'_>> = lines
        .iter()
        .map(|b| Item {
            shard: "http",
            offset: None,
            bytes: b,
            mapping: None,
            topic: None,
            reference: None,
        })
        .collect();
    let report = apply_batch(shards, metrics, Source::Http, &items, 4096);
    assert_eq!(report.results.len(), lines.len());
    let outcomes: u64 = Outcome::ALL.iter().map(|o| report.count(*o)).sum();
    assert_eq!(
        outcomes as usize + report.n_rejected(),
        lines.len(),
        "every event ends exactly once"
    );
    for (_, r) in report.rejects() {
        assert!(
            !r.message.is_empty(),
            "reject {:?} without a message",
            r.reason
        );
    }
    report.n_rejected()
}

fn rejected_in_metrics(metrics: &Metrics) -> u64 {
    RejectReason::ALL
        .iter()
        .map(|r| {
            metrics
                .rejected
                .with_label_values(&["http", r.as_str()])
                .get()
        })
        .sum()
}

#[test]
fn a_hundred_thousand_mutated_events_never_panic_and_every_reject_is_counted() {
    let shards = shards();
    let metrics = Metrics::new();
    let valid = common::workload(71, 20_000).lines;
    let mut rng = StdRng::seed_from_u64(2026);
    let mut total_rejected = 0usize;
    let mut sent = 0usize;
    while sent < 100_000 {
        let batch: Vec<Vec<u8>> = (0..1_000)
            .map(|_| {
                let line = &valid[rng.random_range(0..valid.len())];
                if rng.random_bool(0.8) {
                    mutate(&mut rng, line)
                } else {
                    line.as_bytes().to_vec()
                }
            })
            .collect();
        total_rejected += check_batch(&shards, &metrics, &batch);
        sent += batch.len();
    }
    assert!(
        total_rejected > 50_000,
        "the mutations must actually hit: {total_rejected}"
    );
    assert_eq!(rejected_in_metrics(&metrics), total_rejected as u64);
    // Successes never exceed trials after all that.
    for snap in shards.lock().unwrap().snapshots() {
        for t in &snap.metrics {
            if let posteriord::state::MetricTotals::Conversion(v) = t {
                assert!(v.iter().all(|x| x.successes <= x.trials), "{v:?}");
            }
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(2_000))]
    #[test]
    fn arbitrary_bytes_are_refused_with_a_reason(bytes in proptest::collection::vec(any::<u8>(), 0..300)) {
        let shards = shards();
        let metrics = Metrics::new();
        let refused = check_batch(&shards, &metrics, &[bytes]);
        prop_assert_eq!(rejected_in_metrics(&metrics), refused as u64);
    }

    #[test]
    fn arbitrary_json_objects_never_panic(
        keys in proptest::collection::vec("(type|experiment|variant|metric|unit|id|time|count|exposure|trials|successes|[a-z]{1,6})", 0..8),
        values in proptest::collection::vec(prop_oneof![
            Just("\"exposure\"".to_string()), Just("\"conversion\"".to_string()), Just("\"defect\"".to_string()),
            Just("\"tally\"".to_string()), Just("\"checkout-copy\"".to_string()), Just("\"control\"".to_string()),
            Just("\"purchase\"".to_string()), Just("\"2026-05-02T10:00:00Z\"".to_string()),
            any::<i64>().prop_map(|n| n.to_string()), any::<f64>().prop_filter("finite", |f| f.is_finite()).prop_map(|f| f.to_string()),
            Just("null".to_string()), Just("[]".to_string()), Just("{}".to_string()), "\"[ -~]{0,12}\"".prop_map(|s| s),
        ], 0..8),
    ) {
        let body: Vec<String> = keys.iter().zip(&values).map(|(k, v)| format!("\"{k}\":{v}")).collect();
        let line = format!("{{{}}}", body.join(","));
        let shards = shards();
        let metrics = Metrics::new();
        let refused = check_batch(&shards, &metrics, &[line.into_bytes()]);
        prop_assert_eq!(rejected_in_metrics(&metrics), refused as u64);
    }
}

/// Reference for timestamps: the `time` crate's RFC 3339 parser (an implementation outside
/// this project), truncated to microseconds the way posteriord documents.
fn reference_micros(text: &str) -> Option<i64> {
    time::OffsetDateTime::parse(text, &time::format_description::well_known::Rfc3339)
        .ok()
        .map(|t| (t.unix_timestamp_nanos() / 1_000) as i64)
}

proptest! {
    #![proptest_config(ProptestConfig::with_cases(20_000))]
    /// posteriord parses the common timestamp shapes by hand; every accepted or refused
    /// timestamp must agree with the reference parser.
    #[test]
    fn timestamps_agree_with_the_reference_parser(
        year in prop_oneof![1960i64..1975, 1975i64..2100, 2100i64..10000],
        month in 0u32..14,
        day in 0u32..33,
        hour in 0u32..25,
        minute in 0u32..61,
        second in 0u32..62,
        fraction in prop_oneof![Just(String::new()), "\\.[0-9]{1,12}", Just(".".to_string())],
        offset in prop_oneof![Just("Z".to_string()), Just("z".to_string()), "[+-](0[0-9]|1[0-9]|2[0-5]):[0-6][0-9]", Just("+0100".to_string())],
        sep in prop_oneof![Just('T'), Just('t'), Just(' ')],
    ) {
        let text = format!("{year:04}-{month:02}-{day:02}{sep}{hour:02}:{minute:02}:{second:02}{fraction}{offset}");
        let ours = posteriord::decode::parse_time(&text).ok();
        prop_assert_eq!(ours, reference_micros(&text), "{}", text);
    }
}
