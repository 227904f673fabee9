//! Cost of event-driven evaluation on the ingest path: decode + apply of a stream over 10,000
//! experiments × 4 variants with the per-event cadence check, the snapshots of due
//! experiments and their hand-off to a consumer thread, against the same ingest without any
//! of it, measured alternately in the same run. Quadrature runs on the evaluator thread, not
//! here, so it is left out (the consumer drops the snapshots).
//!
//! Run with `cargo bench --bench evaluation_cadence`; prints events/s of both and the ratio.

use std::sync::Mutex;
use std::time::Instant;

use posteriord::decide::cadence::Cadence;
use posteriord::experiment::{
    ExperimentDef, ExperimentRules, MetricDef, MetricKind, MetricRules, Prior, VariantDef,
};
use posteriord::ingest::{apply_batch_due, Item};
use posteriord::metrics::{Metrics, Source};
use posteriord::state::shards::Shards;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};

const EXPERIMENTS: usize = 10_000;
const EVENTS: usize = 1_000_000;
const BATCH: usize = 1000;

fn defs() -> Vec<ExperimentDef> {
    (0..EXPERIMENTS)
        .map(|e| ExperimentDef {
            generation: 0,
            id: format!("crumb-exp-{e}"),
            control: 0,
            variants: ["control", "a", "b", "c"]
                .iter()
                .map(|n| VariantDef {
                    name: n.to_string(),
                    weight: 0.25,
                })
                .collect(),
            metrics: vec![MetricDef {
                name: "purchase".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None; 4],
                rules: MetricRules::default(),
            }],
            rules: ExperimentRules::default(),
        })
        .collect()
}

/// Exposures and conversions `spacing` µs of event time apart, spread at random over the
/// experiments.
fn stream(spacing: i64) -> Vec<String> {
    let mut rng = StdRng::seed_from_u64(3);
    let start = 1_780_000_000_000_000i64;
    (0..EVENTS)
        .map(|i| {
            let t = start + i as i64 * spacing;
            let secs = t / 1_000_000;
            let micros = t % 1_000_000;
            let time = time::OffsetDateTime::from_unix_timestamp(secs)
                .unwrap()
                .replace_microsecond(micros as u32)
                .unwrap()
                .format(&time::format_description::well_known::Rfc3339)
                .unwrap();
            let e = rng.random_range(0..EXPERIMENTS);
            let unit = rng.random_range(0..200u32);
            if rng.random_bool(0.8) {
                let v = ["control", "a", "b", "c"][rng.random_range(0..4)];
                format!(r#"{{"type":"exposure","experiment":"crumb-exp-{e}","variant":"{v}","unit":"u{unit}","time":"{time}"}}"#)
            } else {
                format!(r#"{{"type":"conversion","experiment":"crumb-exp-{e}","metric":"purchase","unit":"u{unit}","time":"{time}"}}"#)
            }
        })
        .collect()
}

/// Seconds to ingest `lines` into fresh state, with or without the cadence.
fn ingest(lines: &[String], cadence: Option<&Cadence>) -> (f64, usize) {
    let shards = Mutex::new(Shards::new(defs()));
    let metrics = Metrics::new();
    let (tx, rx) = std::sync::mpsc::channel();
    let consumer = std::thread::spawn(move || rx.iter().count());
    let started = Instant::now();
    for chunk in lines.chunks(BATCH) {
        let items: Vec<Item<'_>> = chunk
            .iter()
            .map(|l| Item {
                shard: "kafka/bench/0",
                offset: None,
                bytes: l.as_bytes(),
            })
            .collect();
        let report = apply_batch_due(&shards, &metrics, Source::Kafka, &items, 1 << 16, cadence);
        for snapshot in report.due {
            let _ = tx.send(snapshot);
        }
    }
    let secs = started.elapsed().as_secs_f64();
    drop(tx);
    (secs, consumer.join().unwrap())
}

fn main() {
    println!(
        "ingest of {EVENTS} events over {EXPERIMENTS} experiments × 4 variants, default cadence (10 s of event time or 10000 events), best of 3, alternating:"
    );
    // 50,000, 5,000 and 500 events per second of event time: each experiment is due once in
    // the stream, every ~10 of its events, or at nearly every event (the worst case).
    for spacing in [20i64, 200, 2000] {
        let lines = stream(spacing);
        let cadence = Cadence::new(10_000_000, 10_000);
        let (mut off, mut on) = (Vec::new(), Vec::new());
        let mut due = 0;
        for _ in 0..3 {
            off.push(ingest(&lines, None).0);
            let (s, n) = ingest(&lines, Some(&cadence));
            on.push(s);
            due = n;
        }
        let best = |v: &[f64]| v.iter().copied().fold(f64::INFINITY, f64::min);
        let (off, on) = (best(&off), best(&on));
        println!(
            "  {:>6} events/s of event time: off {:.0} events/s, on {:.0} events/s ({due} snapshots handed off, one per {:.1} events); on/off throughput {:.3} (cost {:.1}%)",
            1_000_000 / spacing,
            EVENTS as f64 / off,
            EVENTS as f64 / on,
            EVENTS as f64 / due.max(1) as f64,
            off / on,
            100.0 * (on - off) / off
        );
    }
}
