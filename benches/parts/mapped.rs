//! Target 8 of docs/performance.md: a team's own streams. (a) Mapped decoding plus
//! attribution through exposures of business-event lines (nested JSON, RFC 3339 times with
//! offsets, no experiment), with 1 000 experiments running and each unit in 1 to 4 of them,
//! against serde_json parsing the same lines into a borrowed record, same run. (b) The memory
//! of the membership index at 10 M (unit, experiment) memberships, from the counting
//! allocator, beside the experiments' own unit tables.
//!
//! Included by `targets.rs` (`#[path]`), so it shares its workload, timers and rows.

use std::sync::Mutex;

use posteriord::event::{Event, EventBody, Outcome};
use posteriord::service::ingest::{apply_batch, Item};
use posteriord::service::metrics::{Metrics, Source};
use posteriord::state::shards::{ShardId, Shards};
use posteriord::state::Engine;

use super::{fastest, live_heap, sized, smoke, workload_config, CpuTimer, Rng, Row};

const EXPERIMENTS: usize = 1_000;

/// The two `[[source]]`s of the bench: the invented gardening app's assignment service (epoch
/// milliseconds, nested unit) and its activity stream (RFC 3339 with an offset, no experiment).
const SOURCES: &str = r#"
[[source]]
name = "orchard-assign"
unit = "gardener.id"
time = "ms"
time_format = "epoch_millis"
experiment = "test.key"
variant = "test.arm"
exposures = ["assigned"]
constants = { event = "assigned" }

[[source]]
name = "orchard-activity"
unit = "who.gardener"
time = "at"
event = "what"
id = "ref"
metrics = { "seed.planted" = "planted", "app.crash" = "crash" }
"#;

/// The fields of an activity line, borrowed: what serde_json fills and nothing more.
#[derive(serde::Deserialize)]
#[allow(dead_code)] // read only through black_box
struct Activity<'a> {
    #[serde(borrow)]
    what: &'a str,
    #[serde(borrow)]
    who: Who<'a>,
    #[serde(borrow)]
    at: &'a str,
    #[serde(borrow)]
    r#ref: Option<&'a str>,
    qty: Option<i64>,
}

#[derive(serde::Deserialize)]
#[allow(dead_code)]
struct Who<'a> {
    #[serde(borrow)]
    gardener: &'a str,
    #[serde(borrow)]
    plot: Option<&'a str>,
}

/// Assignment lines for `units` gardeners, each in 1 to 4 experiments, and `events` activity
/// lines (70% plantings, 20% crashes, 10% lines no metric maps) after them in time.
fn lines(units: usize, events: usize) -> (Vec<Vec<u8>>, Vec<Vec<u8>>) {
    let mut rng = Rng(0x0005_eed0_f0ac_4a2d);
    let base_ms = 1_780_000_000_000i64;
    let mut assign = Vec::new();
    for u in 0..units {
        let k = 1 + rng.below(4) as usize;
        for j in 0..k {
            let e = (rng.below(EXPERIMENTS as u64) as usize + j * 97) % EXPERIMENTS;
            let line = format!(
                r#"{{"gardener":{{"id":"g-{u}","zone":"z{}"}},"ms":{},"test":{{"key":"orchard-{e}","arm":"v{}"}}}}"#,
                u % 7,
                base_ms + u as i64,
                rng.below(2)
            );
            assign.push(line.into_bytes());
        }
    }
    // The assignment stream goes on (a day later), so its watermark has passed every
    // activity line and none waits: what is timed is decoding and attribution.
    assign.push(
        format!(
            r#"{{"gardener":{{"id":"g-tail"}},"ms":{},"test":{{"key":"orchard-0","arm":"v0"}}}}"#,
            base_ms + 86_400_000
        )
        .into_bytes(),
    );
    let mut activity = Vec::with_capacity(events);
    for i in 0..events {
        let u = rng.below(units as u64);
        let what = match rng.below(10) {
            0..=6 => "seed.planted",
            7..=8 => "app.crash",
            _ => "app.open",
        };
        // An hour after the assignments, written in UTC+02:00.
        let secs = 1_780_000_000 + 3_600 + (i / 200) as i64;
        let t = time::OffsetDateTime::from_unix_timestamp(secs)
            .unwrap()
            .to_offset(time::UtcOffset::from_hms(2, 0, 0).unwrap());
        let at = t
            .format(&time::format_description::well_known::Rfc3339)
            .unwrap();
        let line = format!(
            r#"{{"what":"{what}","who":{{"gardener":"g-{u}","plot":"p{}"}},"at":"{at}","ref":"a-{i}","qty":1}}"#,
            u % 13
        );
        activity.push(line.into_bytes());
    }
    (assign, activity)
}

/// Feed `lines` of `topic` under `mapping` into the co-partitioned shard, as the consumer
/// does (batches of 500 with offsets); returns how many were applied somewhere.
fn feed(
    shards: &Mutex<Shards>,
    metrics: &Metrics,
    mapping: &posteriord::mapping::Mapping,
    topic: &str,
    lines: &[Vec<u8>],
) -> u64 {
    let shard = ShardId::co_partitioned(0);
    let mut applied = 0;
    for (c, chunk) in lines.chunks(500).enumerate() {
        let items: Vec<Item<'_>> = chunk
            .iter()
            .enumerate()
            .map(|(j, b)| Item {
                shard: shard.as_str(),
                offset: Some((c * 500 + j) as i64),
                bytes: b,
                mapping: Some(mapping),
                topic: Some(topic),
                // Unchecked: this target measures decoding and attribution.
                reference: None,
            })
            .collect();
        let report = apply_batch(shards, metrics, Source::Kafka, &items, 64 * 1024);
        applied += report.count(Outcome::Applied);
    }
    applied
}

pub fn mapped_target() -> Vec<Row> {
    let (units, events) = (sized(400_000, 2_000), sized(1_000_000, 5_000));
    println!(
        "\n== mapped sources: {events} activity lines attributed through {units} gardeners' exposures, {EXPERIMENTS} experiments, each gardener in 1-4 =="
    );
    let config = workload_config(EXPERIMENTS, 2, SOURCES);
    let assign = config.source("orchard-assign").unwrap().mapping.clone();
    let activity = config.source("orchard-activity").unwrap().mapping.clone();
    let (assign_lines, activity_lines) = lines(units, events);
    let bytes: usize = activity_lines.iter().map(Vec::len).sum();
    let metrics = Metrics::new();
    let (mut parse, mut ours, mut decode) = (Vec::new(), Vec::new(), Vec::new());
    for round in 0..3 {
        let t = CpuTimer::start();
        let mut ok = 0usize;
        for l in &activity_lines {
            if let Ok(a) = serde_json::from_slice::<Activity<'_>>(l) {
                std::hint::black_box(&a);
                ok += 1;
            }
        }
        parse.push(t.secs());
        assert_eq!(ok, activity_lines.len());

        let t = CpuTimer::start();
        let mut ok = 0usize;
        for l in &activity_lines {
            ok += matches!(activity.decode(l, 64 * 1024), Ok(Some(_))) as usize;
        }
        decode.push(t.secs());
        std::hint::black_box(ok);

        // Fresh state each round (a conversion counts once per unit), exposures untimed.
        let shards = Mutex::new(Shards::new(config.experiments.iter().cloned()));
        feed(&shards, &metrics, &assign, "assign", &assign_lines);
        let t = CpuTimer::start();
        let applied = feed(&shards, &metrics, &activity, "activity", &activity_lines);
        ours.push(t.secs());
        if round == 0 {
            let s = shards.lock().unwrap();
            let shard = s.shard(ShardId::co_partitioned(0).as_str()).unwrap();
            println!(
                "  {applied} of {events} lines applied in at least one experiment; {} memberships; {} held",
                shard.engine().n_memberships(),
                shard.n_held()
            );
        }
    }
    let (parse, ours) = (fastest(parse), fastest(ours));
    let mbs = |s: f64| format!("{:.0} MB/s", bytes as f64 / s / 1e6);
    println!("  serde_json borrowed record:          {}", mbs(parse));
    println!(
        "  mapped decode only:                  {}",
        mbs(fastest(decode))
    );
    println!("  mapped decode + attribution + apply: {}", mbs(ours));
    let mut rows = vec![Row {
        target: "8a mapped + attribution vs serde_json record",
        baseline: mbs(parse),
        ours: mbs(ours),
        ratio: format!("{:.2}×", parse / ours),
        goal: ">= 0.5x",
        met: (!smoke()).then_some(parse / ours >= 0.5),
    }];
    rows.extend(membership_memory());
    rows
}

/// Heap of an engine holding `n` memberships (units in 1 to 4 of 1 000 experiments), from the
/// counting allocator: the index alone and with the experiments' unit tables.
fn membership_memory() -> Vec<Row> {
    let n = sized(10_000_000, 20_000);
    let config = workload_config(EXPERIMENTS, 2, "");
    let mut rng = Rng(0x0b5e_55ed);
    let before = live_heap();
    let mut engine = Engine::new(config.experiments.iter().cloned());
    let ids: Vec<String> = (0..EXPERIMENTS).map(|e| format!("orchard-{e}")).collect();
    let (mut made, mut u) = (0usize, 0u64);
    let mut unit = String::new();
    while made < n {
        let k = (1 + rng.below(4) as usize).min(n - made);
        unit.clear();
        use std::fmt::Write;
        write!(unit, "g-{u}").unwrap();
        let first = rng.below(EXPERIMENTS as u64) as usize;
        for j in 0..k {
            let e = (first + j * 97) % EXPERIMENTS;
            let ev = Event {
                experiment: ids[e].as_str().into(),
                id: None,
                time: Some(1_780_000_000_000_000 + u as i64),
                body: EventBody::Exposure {
                    variant: if rng.below(2) == 0 { "v0" } else { "v1" }.into(),
                    unit: unit.as_str().into(),
                },
            };
            assert_eq!(engine.apply(&ev), Ok(Outcome::Applied));
        }
        made += k;
        u += 1;
    }
    let total = live_heap() - before;
    let index = engine.membership_bytes();
    assert_eq!(engine.n_memberships(), n);
    let per = |b: usize| b as f64 / n as f64;
    println!(
        "  {n} memberships of {u} units: index {:.1} B, with the experiments' unit tables {:.1} B per membership",
        per(index),
        per(total)
    );
    std::hint::black_box(&engine);
    vec![
        Row {
            target: "8b membership index, B per membership",
            baseline: "budget 24 B".into(),
            ours: format!("{:.1} B", per(index)),
            ratio: format!("{:.2}×", per(index) / 24.0),
            goal: "<= 1.0x budget",
            met: (!smoke()).then_some(per(index) <= 24.0),
        },
        Row {
            target: "8b index + unit tables, B per membership",
            baseline: "budget 24 B".into(),
            ours: format!("{:.1} B", per(total)),
            ratio: format!("{:.2}×", per(total) / 24.0),
            goal: "<= 1.0x budget",
            met: (!smoke()).then_some(per(total) <= 24.0),
        },
    ]
}
