//! The performance targets of docs/performance.md, each measured beside its baseline in the
//! same run and printed as a ratio: ingest vs serde_json parse-only, memory per unit and per
//! variant (counting allocator), restart time, Kafka end to end vs a bare rdkafka loop, ingest
//! under HTTP read load (wrk), the cost of rule evaluation, and the fleet view at 5 000
//! experiments (list page and overview in Chromium, `parts/fleet.rs`), and a team's own
//! streams: mapped decoding with attribution, and the membership index's memory
//! (`parts/mapped.rs`), and a consumer group of 1, 2 and 3 instances on one unit-keyed topic
//! (`parts/group.rs`).
//!
//! Run all with `cargo bench --bench targets`, or some with
//! `cargo bench --bench targets -- ingest memory restart kafka http evaluation fleet mapped group`.
//! `POSTERIORD_BENCH_UNITS` sets the units of the memory/restart state (default 10 000 000);
//! `POSTERIORD_BENCH_BROKERS` names a broker, else Apache Kafka is started on loopback with
//! tests/kafka/broker.sh.
//! The memory figures come from a child process (this binary with `--child`), so that what
//! other targets allocated does not count.

use std::alloc::{GlobalAlloc, Layout, System};
use std::borrow::Cow;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;
use std::time::{Duration, Instant};

use posteriord::config::Config;
use posteriord::event::{Event, EventBody};
use posteriord::service::ingest::Item;
use posteriord::service::metrics::{Metrics, Source};
use posteriord::service::store::Store;
use posteriord::state::shards::Shards;

#[path = "parts/fleet.rs"]
mod fleet;
#[path = "parts/group.rs"]
mod group;
#[path = "parts/mapped.rs"]
mod mapped;

/// Counts live heap bytes, so memory per unit is measured rather than estimated.
struct Counting;

static LIVE: AtomicUsize = AtomicUsize::new(0);

// SAFETY: every call is forwarded to the system allocator unchanged; only a counter is added.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        LIVE.fetch_add(layout.size(), Ordering::Relaxed);
        System.alloc(layout)
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
        System.dealloc(ptr, layout)
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        LIVE.fetch_add(layout.size(), Ordering::Relaxed);
        System.alloc_zeroed(layout)
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        LIVE.fetch_add(new_size, Ordering::Relaxed);
        LIVE.fetch_sub(layout.size(), Ordering::Relaxed);
        System.realloc(ptr, layout, new_size)
    }
}

#[global_allocator]
static ALLOCATOR: Counting = Counting;

fn live_heap() -> usize {
    LIVE.load(Ordering::Relaxed)
}

/// One printed line of the final table.
struct Row {
    target: &'static str,
    baseline: String,
    ours: String,
    ratio: String,
    goal: &'static str,
    met: Option<bool>,
}

/// Whether this is a smoke run: `cargo test --all-targets` (the README's test command) runs
/// this binary without `--bench`, in a debug build; it then runs every target at a small
/// scale, to show the harness works end to end, and its figures mean nothing.
fn smoke() -> bool {
    std::env::var_os("POSTERIORD_BENCH_SMOKE").is_some()
}

/// `full` for a benchmark run, `small` for a smoke run.
fn sized(full: usize, small: usize) -> usize {
    if smoke() {
        small
    } else {
        full
    }
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if let Some(i) = args.iter().position(|a| a == "--child") {
        child(&args[i + 1..]);
        return;
    }
    if !args.iter().any(|a| a == "--bench") {
        // Children inherit it.
        std::env::set_var("POSTERIORD_BENCH_SMOKE", "1");
        println!("smoke run (no --bench): every target at a small scale; the figures mean nothing");
    }
    let wanted: Vec<&str> = args
        .iter()
        .map(String::as_str)
        .filter(|a| !a.starts_with("--"))
        .collect();
    let want = |name: &str| wanted.is_empty() || wanted.contains(&name);
    print_machine();
    let work = tempfile::tempdir().expect("temporary directory");
    let mut rows = Vec::new();
    if want("ingest") {
        rows.extend(ingest_target());
    }
    if want("memory") || want("restart") {
        rows.extend(memory_and_restart(work.path(), want("restart")));
    }
    if want("kafka") || want("http") {
        rows.extend(kafka_targets(work.path(), want("kafka"), want("http")));
    }
    if want("evaluation") {
        rows.extend(evaluation_target());
    }
    if want("fleet") {
        rows.extend(fleet::fleet_target(work.path()));
    }
    if want("mapped") {
        rows.extend(mapped::mapped_target());
    }
    if want("group") {
        rows.extend(group::group_target(work.path()));
    }
    if smoke() {
        for r in &rows {
            assert!(
                !r.ratio.contains("not run"),
                "target `{}` did not run",
                r.target
            );
        }
        // Every target reports when none is named; a named subset reports its own rows.
        assert!(
            rows.len() >= if wanted.is_empty() { 12 } else { 1 },
            "every target reported ({} rows)",
            rows.len()
        );
        println!("smoke run: all {} rows produced", rows.len());
        return;
    }
    println!("\n== summary (ratios from this run; see docs/performance.md) ==");
    println!(
        "{:<44} {:>26} {:>26} {:>10}  {:<14} met",
        "target", "baseline", "posteriord", "ratio", "goal"
    );
    for r in &rows {
        let met = match r.met {
            Some(true) => "yes",
            Some(false) => "NO",
            None => "-",
        };
        println!(
            "{:<44} {:>26} {:>26} {:>10}  {:<14} {met}",
            r.target, r.baseline, r.ours, r.ratio, r.goal
        );
    }
}

fn print_machine() {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("model name"))
                .map(|l| l.split(':').nth(1).unwrap_or("").trim().to_string())
        })
        .unwrap_or_else(|| "unknown CPU".into());
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    println!("machine: {cpu}, {cores} cores");
    println!("reproduce: cargo bench --bench targets [-- TARGET...]");
}

// ---------------------------------------------------------------------------------------
// The workload: an invented gardening app's experiments and a realistic event mix.

/// Experiments of the bench workload: `n` experiments of the gardening app "Pocket Orchard",
/// each with `variants` variants, a conversion metric and a defect-rate metric.
fn workload_toml(n: usize, variants: usize) -> String {
    let mut s = String::new();
    for e in 0..n {
        s.push_str(&format!(
            "[[experiment]]\nid = \"orchard-{e}\"\ncontrol = \"v0\"\nvariants = ["
        ));
        for v in 0..variants {
            let sep = if v + 1 < variants { ", " } else { "" };
            s.push_str(&format!(
                "{{ name = \"v{v}\", weight = {} }}{sep}",
                1.0 / variants as f64
            ));
        }
        s.push_str("]\n[[experiment.metric]]\nname = \"planted\"\nkind = \"conversion\"\n");
        s.push_str("[[experiment.metric]]\nname = \"crash\"\nkind = \"defect_rate\"\nexposure = \"units\"\n");
    }
    s
}

fn workload_config(n: usize, variants: usize, head: &str) -> Config {
    let text = format!("{head}\n{}", workload_toml(n, variants));
    Config::parse(&text, "bench", &[]).expect("bench config is valid")
}

/// A small deterministic generator (xorshift64*): the bench needs the same bytes every run,
/// not statistical quality.
struct Rng(u64);

impl Rng {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
    }
    fn below(&mut self, n: u64) -> u64 {
        self.next() % n
    }
    fn chance(&mut self, per_mille: u64) -> bool {
        self.below(1000) < per_mille
    }
}

/// `n_events` encoded events over `n_experiments` × `variants`: exposures (half with an
/// event id, 1% producer retries), 12% conversions, 3% defects, 1% crossovers, 0.5% orphan
/// conversions and 0.3% malformed lines — the mix of docs/performance.md.
fn workload_events(n_events: usize, n_experiments: usize, variants: usize) -> Vec<Vec<u8>> {
    workload_events_at(n_events, n_experiments, variants, 200)
}

/// [`workload_events`] with `per_second` events per second of event time.
fn workload_events_at(
    n_events: usize,
    n_experiments: usize,
    variants: usize,
    per_second: i64,
) -> Vec<Vec<u8>> {
    let mut rng = Rng(0x0a7c_4a2d_91e3_55b1);
    let mut out: Vec<Vec<u8>> = Vec::with_capacity(n_events);
    let mut exposed: Vec<(u64, usize, usize)> = Vec::new();
    let mut next_unit = 0u64;
    let base = 1_780_000_000i64; // 2026-05-28, seconds
    while out.len() < n_events {
        let i = out.len() as i64;
        let t = time_text(base + i / per_second);
        let roll = rng.below(1000);
        let line = if roll < 3 {
            // Truncated or mistyped events, as a broken producer would send.
            match rng.below(3) {
                0 => r#"{"type":"exposure","experiment":"orchard-1","variant":"v0","unit":"#
                    .to_string(),
                1 => r#"{"type":"conversion","experiment":"orchard-1","metric":7,"unit":"x"}"#
                    .to_string(),
                _ => r#"{"type":"teleport","experiment":"orchard-1"}"#.to_string(),
            }
        } else if roll < 8 {
            let e = rng.below(n_experiments as u64);
            format!(
                r#"{{"type":"conversion","experiment":"orchard-{e}","metric":"planted","unit":"ghost-{}","time":"{t}"}}"#,
                rng.next() % 1_000_000
            )
        } else if roll < 128 && !exposed.is_empty() {
            let (u, e, _) = exposed[rng.below(exposed.len() as u64) as usize];
            format!(
                r#"{{"type":"conversion","experiment":"orchard-{e}","metric":"planted","unit":"gardener-{u}","time":"{t}"}}"#
            )
        } else if roll < 158 && !exposed.is_empty() {
            let (u, e, _) = exposed[rng.below(exposed.len() as u64) as usize];
            format!(
                r#"{{"type":"defect","experiment":"orchard-{e}","metric":"crash","unit":"gardener-{u}","count":1,"time":"{t}","id":"crash-{i}"}}"#
            )
        } else if roll < 168 && !exposed.is_empty() {
            let (u, e, v) = exposed[rng.below(exposed.len() as u64) as usize];
            let other = (v + 1) % variants;
            format!(
                r#"{{"type":"exposure","experiment":"orchard-{e}","variant":"v{other}","unit":"gardener-{u}","time":"{t}"}}"#
            )
        } else {
            next_unit += 1;
            let e = rng.below(n_experiments as u64) as usize;
            let v = rng.below(variants as u64) as usize;
            if exposed.len() < 1 << 20 {
                exposed.push((next_unit, e, v));
            } else {
                let k = rng.below(exposed.len() as u64) as usize;
                exposed[k] = (next_unit, e, v);
            }
            let id = if rng.chance(500) {
                format!(r#","id":"app-{next_unit}""#)
            } else {
                String::new()
            };
            let line = format!(
                r#"{{"type":"exposure","experiment":"orchard-{e}","variant":"v{v}","unit":"gardener-{next_unit}","time":"{t}"{id}}}"#
            );
            if !id.is_empty() && rng.chance(10) {
                out.push(line.clone().into_bytes());
            }
            line
        };
        out.push(line.into_bytes());
    }
    out.truncate(n_events);
    out
}

fn time_text(secs: i64) -> String {
    let t = time::OffsetDateTime::from_unix_timestamp(secs).expect("valid time");
    t.format(&time::format_description::well_known::Rfc3339)
        .expect("formats")
}

/// CPU time of the calling thread: the in-process targets use it instead of wall time, so
/// that time the scheduler gives to other processes on this shared machine does not count.
fn thread_cpu_secs() -> f64 {
    let mut ts = libc::timespec {
        tv_sec: 0,
        tv_nsec: 0,
    };
    // SAFETY: `ts` is a valid, writable timespec for the duration of the call.
    let rc = unsafe { libc::clock_gettime(libc::CLOCK_THREAD_CPUTIME_ID, &mut ts) };
    assert_eq!(rc, 0, "clock_gettime(CLOCK_THREAD_CPUTIME_ID)");
    ts.tv_sec as f64 + ts.tv_nsec as f64 * 1e-9
}

/// Stopwatch over the calling thread's CPU time.
struct CpuTimer(f64);

impl CpuTimer {
    fn start() -> CpuTimer {
        CpuTimer(thread_cpu_secs())
    }
    fn secs(&self) -> f64 {
        thread_cpu_secs() - self.0
    }
}

/// The fastest of several rounds: noise on a shared machine only ever adds time.
fn fastest(xs: Vec<f64>) -> f64 {
    xs.into_iter().fold(f64::INFINITY, f64::min)
}

fn median(mut xs: Vec<f64>) -> f64 {
    xs.sort_by(f64::total_cmp);
    xs[xs.len() / 2]
}

/// A row for a figure against its budget; `judged` is false when the run's scale is too small
/// for the budget to mean anything (a smoke run, or fewer units than the target names).
fn budget_row(target: &'static str, ours: f64, budget: f64, unit: &str, judged: bool) -> Row {
    Row {
        target,
        baseline: format!("budget {budget:.0} {unit}"),
        ours: format!("{ours:.1} {unit}"),
        ratio: format!("{:.2}×", ours / budget),
        goal: "<= 1.0x budget",
        met: judged.then_some(ours <= budget),
    }
}

fn ratio_row(
    target: &'static str,
    baseline: String,
    ours: String,
    ratio: f64,
    goal: &'static str,
    at_least: f64,
) -> Row {
    Row {
        target,
        baseline,
        ours,
        ratio: format!("{ratio:.2}×"),
        goal,
        met: Some(ratio >= at_least),
    }
}

// ---------------------------------------------------------------------------------------
// Target 1: in-process ingest vs serde_json parse-only.

/// The fields of an event, borrowed: what serde_json parses when it fills a typed record and
/// nothing else (no validation, no time parsing, no state). Same field set as the decoder's.
#[derive(serde::Deserialize)]
#[allow(dead_code)] // read only through black_box
struct ParsedOnly<'a> {
    #[serde(rename = "type", borrow)]
    kind: Option<&'a str>,
    #[serde(borrow)]
    experiment: Option<&'a str>,
    #[serde(borrow)]
    variant: Option<&'a str>,
    #[serde(borrow)]
    metric: Option<&'a str>,
    #[serde(borrow)]
    unit: Option<&'a str>,
    #[serde(borrow)]
    id: Option<&'a str>,
    #[serde(borrow)]
    time: Option<&'a str>,
    count: Option<i64>,
    exposure: Option<f64>,
    trials: Option<i64>,
    successes: Option<i64>,
}

/// Decode and apply `events` into fresh state, in Kafka-sized batches; events applied.
fn ingest_once(config: &Config, events: &[Vec<u8>]) -> u64 {
    let shards = Mutex::new(Shards::new(config.experiments.iter().cloned()));
    ingest_into(&shards, events, None, |_| {})
}

/// Decode and apply `events` into `shards` in Kafka-sized batches of one shard, as the
/// consumer does, handing each due snapshot (with a `cadence`) to `on_due`; events applied.
fn ingest_into(
    shards: &Mutex<Shards>,
    events: &[Vec<u8>],
    cadence: Option<&posteriord::state::cadence::Cadence>,
    mut on_due: impl FnMut(posteriord::state::ExperimentSnapshot),
) -> u64 {
    const BATCH: usize = 500;
    let metrics = Metrics::new();
    let mut applied = 0u64;
    for (c, chunk) in events.chunks(BATCH).enumerate() {
        let items: Vec<Item<'_>> = chunk
            .iter()
            .enumerate()
            .map(|(j, b)| Item {
                shard: "bench-0",
                offset: Some((c * BATCH + j) as i64),
                bytes: b,
                mapping: None,
                topic: None,
                reference: None,
            })
            .collect();
        let report = posteriord::service::ingest::apply_batch_due(
            shards,
            &metrics,
            Source::Kafka,
            &items,
            64 * 1024,
            cadence,
        );
        applied += report.count(posteriord::event::Outcome::Applied);
        report.due.into_iter().for_each(&mut on_due);
    }
    applied
}

fn ingest_target() -> Vec<Row> {
    let n = sized(1_000_000, 5_000);
    println!("\n== ingest: {n} mixed events, 20 experiments × 4 variants, batches of 500 ==");
    let events = workload_events(n, 20, 4);
    let bytes: usize = events.iter().map(Vec::len).sum();
    let config = workload_config(20, 4, "");
    let mut parse_any = Vec::new();
    let mut parse_value = Vec::new();
    let mut parse_typed = Vec::new();
    let mut decode_only = Vec::new();
    let mut ours = Vec::new();
    for round in 0..5 {
        let t = CpuTimer::start();
        let mut ok = 0usize;
        for e in &events {
            if let Ok(p) = serde_json::from_slice::<ParsedOnly<'_>>(e) {
                std::hint::black_box(&p);
                ok += 1;
            }
        }
        parse_typed.push(t.secs());
        std::hint::black_box(ok);

        let t = CpuTimer::start();
        let mut ok = 0usize;
        for e in &events {
            ok += serde_json::from_slice::<serde::de::IgnoredAny>(e).is_ok() as usize;
        }
        parse_any.push(t.secs());
        std::hint::black_box(ok);

        let t = CpuTimer::start();
        let mut ok = 0usize;
        for e in &events {
            ok += serde_json::from_slice::<serde_json::Value>(e).is_ok() as usize;
        }
        parse_value.push(t.secs());
        std::hint::black_box(ok);

        let t = CpuTimer::start();
        let mut ok = 0usize;
        for e in &events {
            ok += posteriord::decode::decode_event(e, 64 * 1024).is_ok() as usize;
        }
        decode_only.push(t.secs());
        std::hint::black_box(ok);

        let t = CpuTimer::start();
        let applied = ingest_once(&config, &events);
        ours.push(t.secs());
        if round == 0 {
            println!("  {applied} of {n} events applied (the rest: duplicates, orphans, crossovers, malformed)");
        }
    }
    let (any, value, typed, ours) = (
        fastest(parse_any),
        fastest(parse_value),
        fastest(parse_typed),
        fastest(ours),
    );
    let mbs = |s: f64| format!("{:.0} MB/s", bytes as f64 / s / 1e6);
    let evs = |s: f64| format!("{:.2} M ev/s", n as f64 / s / 1e6);
    println!(
        "  serde_json IgnoredAny (validate only): {} {}",
        mbs(any),
        evs(any)
    );
    println!(
        "  serde_json Value (DOM):                {} {}",
        mbs(value),
        evs(value)
    );
    println!(
        "  serde_json typed record (borrowed):    {} {}",
        mbs(typed),
        evs(typed)
    );
    let decode = fastest(decode_only);
    println!(
        "  posteriord decode only:                {} {}",
        mbs(decode),
        evs(decode)
    );
    println!(
        "  posteriord decode + apply:             {} {}",
        mbs(ours),
        evs(ours)
    );
    vec![
        ratio_row(
            "1 ingest vs serde_json typed record",
            mbs(typed),
            mbs(ours),
            typed / ours,
            ">= 0.5x",
            0.5,
        ),
        ratio_row(
            "1 ingest vs serde_json IgnoredAny",
            mbs(any),
            mbs(ours),
            any / ours,
            ">= 0.5x",
            0.5,
        ),
        ratio_row(
            "1 ingest vs serde_json Value",
            mbs(value),
            mbs(ours),
            value / ours,
            ">= 0.5x",
            0.5,
        ),
    ]
}

// ---------------------------------------------------------------------------------------
// Targets 4 and 6: memory per unit and per variant; restart with that state.

fn units_wanted() -> usize {
    std::env::var("POSTERIORD_BENCH_UNITS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or_else(|| sized(10_000_000, 20_000))
}

/// Runs in a child process: prints `RESULT key value` lines.
fn child(args: &[String]) {
    match args.first().map(String::as_str) {
        Some("units") => {
            let n: usize = args[1].parse().expect("unit count");
            let store = args.get(2).map(PathBuf::from);
            child_units(n, store.as_deref());
        }
        Some("variants") => child_variants(),
        Some("ingest-profile") => {
            // Our ingest path alone, for `perf record`: docs/performance.md.
            let events = workload_events(1_000_000, 20, 4);
            let config = workload_config(20, 4, "");
            for _ in 0..3 {
                std::hint::black_box(ingest_once(&config, &events));
            }
        }
        other => panic!("unknown child task {other:?}"),
    }
}

fn rss_kib(field: &str) -> u64 {
    std::fs::read_to_string("/proc/self/status")
        .ok()
        .and_then(|s| {
            s.lines().find(|l| l.starts_with(field)).and_then(|l| {
                l.split_whitespace()
                    .nth(1)
                    .and_then(|v| v.parse::<u64>().ok())
            })
        })
        .unwrap_or(0)
}

fn child_units(n: usize, store: Option<&Path>) {
    let config = workload_config(1, 2, "");
    let rss_before = rss_kib("VmRSS:");
    let before = live_heap();
    let mut shards = Shards::new(config.experiments.iter().cloned());
    let shard = shards.shard_mut("http");
    let mut unit = String::with_capacity(32);
    let variants = ["v0", "v1"];
    for i in 0..n {
        unit.clear();
        use std::fmt::Write as _;
        write!(unit, "gardener-{i}").expect("string write");
        let event = Event {
            experiment: Cow::Borrowed("orchard-0"),
            id: None,
            time: Some(1_780_000_000_000_000 + i as i64),
            body: EventBody::Exposure {
                variant: Cow::Borrowed(variants[i % 2]),
                unit: Cow::Borrowed(&unit),
            },
        };
        shard.apply(&event).expect("valid exposure");
        if i % 10 == 0 {
            let conversion = Event {
                experiment: Cow::Borrowed("orchard-0"),
                id: None,
                time: None,
                body: EventBody::Conversion {
                    metric: Cow::Borrowed("planted"),
                    unit: Cow::Borrowed(&unit),
                },
            };
            shard.apply(&conversion).expect("valid conversion");
        }
    }
    let heap = live_heap() - before;
    println!("RESULT units {n}");
    println!("RESULT heap_bytes {heap}");
    println!("RESULT rss_kib {}", rss_kib("VmRSS:"));
    println!("RESULT rss_before_kib {rss_before}");
    println!("RESULT hwm_kib {}", rss_kib("VmHWM:"));
    if let Some(dir) = store {
        let image = shards.shard("http").expect("shard exists").image();
        let store = Store::open(dir).expect("store opens");
        store.save("http", &image).expect("store saves");
        println!(
            "RESULT store_bytes {}",
            std::fs::metadata(store.path("http")).map_or(0, |m| m.len())
        );
    }
}

fn child_variants() {
    let experiments = sized(10_000, 200);
    const VARIANTS: usize = 4;
    let before = live_heap();
    let config = workload_config(experiments, VARIANTS, "");
    let mut shards = Shards::new(config.experiments.iter().cloned());
    drop(config);
    // One unit per variant, so every experiment holds live totals.
    let shard = shards.shard_mut("bench-0");
    for e in 0..experiments {
        let id = format!("orchard-{e}");
        for v in 0..VARIANTS {
            let variant = format!("v{v}");
            let unit = format!("g-{e}-{v}");
            let event = Event {
                experiment: Cow::Borrowed(&id),
                id: None,
                time: Some(1_780_000_000_000_000),
                body: EventBody::Exposure {
                    variant: Cow::Borrowed(&variant),
                    unit: Cow::Borrowed(&unit),
                },
            };
            shard.apply(&event).expect("valid exposure");
        }
    }
    let heap = live_heap() - before;
    println!("RESULT variants {}", experiments * VARIANTS);
    println!("RESULT heap_bytes {heap}");
    std::hint::black_box(&shards);
}

fn run_child(args: &[&str]) -> std::collections::HashMap<String, f64> {
    let exe = std::env::current_exe().expect("own path");
    let out = Command::new(exe)
        .arg("--child")
        .args(args)
        .stderr(Stdio::inherit())
        .output()
        .expect("child runs");
    assert!(out.status.success(), "child {args:?} failed");
    String::from_utf8_lossy(&out.stdout)
        .lines()
        .filter_map(|l| {
            let mut it = l.strip_prefix("RESULT ")?.split_whitespace();
            Some((it.next()?.to_string(), it.next()?.parse().ok()?))
        })
        .collect()
}

fn memory_and_restart(work: &Path, restart: bool) -> Vec<Row> {
    let n = units_wanted();
    println!("\n== memory: {n} units in one experiment (child process, counting allocator) ==");
    let store_dir = work.join("restart-store");
    let n_text = n.to_string();
    let store_text = store_dir.display().to_string();
    let mut args = vec!["units", n_text.as_str()];
    if restart {
        args.push(&store_text);
    }
    let r = run_child(&args);
    let per_unit = r["heap_bytes"] / r["units"];
    let rss_mib = r["rss_kib"] / 1024.0;
    println!(
        "  heap {:.1} MiB = {per_unit:.1} B/unit; RSS {rss_mib:.0} MiB (process start {:.0} MiB, peak {:.0} MiB)",
        r["heap_bytes"] / 1048576.0,
        r["rss_before_kib"] / 1024.0,
        r["hwm_kib"] / 1024.0
    );
    let v = run_child(&["variants"]);
    let per_variant = v["heap_bytes"] / v["variants"];
    println!(
        "  10 000 experiments × 4 variants (2 metrics each): heap {:.1} MiB = {per_variant:.0} B/variant",
        v["heap_bytes"] / 1048576.0
    );
    let full_scale = n >= 10_000_000;
    let mut rows = vec![
        budget_row("4 memory per tracked unit", per_unit, 24.0, "B", true),
        budget_row(
            "4 memory per experiment variant",
            per_variant,
            4096.0,
            "B",
            true,
        ),
        budget_row(
            "4 RSS with the units (whole process)",
            rss_mib,
            400.0,
            "MiB",
            full_scale,
        ),
    ];
    if restart {
        rows.extend(restart_target(work, &store_dir, n, r["store_bytes"]));
    }
    rows
}

fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0")
        .expect("bind")
        .local_addr()
        .expect("addr")
        .port()
}

/// Minimal HTTP/1.1 GET over a fresh connection: status code and body.
fn http_get(port: u16, path: &str) -> Option<(u16, String)> {
    http_request(port, "GET", path, None)
}

/// Minimal HTTP/1.1 request over a fresh connection (a JSON body, if any): status and body.
fn http_request(port: u16, method: &str, path: &str, body: Option<&str>) -> Option<(u16, String)> {
    let mut s = std::net::TcpStream::connect(("127.0.0.1", port)).ok()?;
    s.set_read_timeout(Some(Duration::from_secs(30))).ok()?;
    let body = body.unwrap_or("");
    write!(
        s,
        "{method} {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nContent-Type: application/json\r\nContent-Length: {}\r\nConnection: close\r\n\r\n{body}",
        body.len()
    )
    .ok()?;
    let mut text = String::new();
    s.read_to_string(&mut text).ok()?;
    let status = text.split_whitespace().nth(1)?.parse().ok()?;
    let reply = text
        .split_once("\r\n\r\n")
        .map_or("", |(_, b)| b)
        .to_string();
    Some((status, reply))
}

struct Server {
    child: Child,
    port: u16,
}

impl Server {
    fn start(dir: &Path, config_text: &str) -> Server {
        std::fs::create_dir_all(dir).expect("server dir");
        let port = free_port();
        let text = format!("[http]\naddr = \"127.0.0.1:{port}\"\n{config_text}");
        let path = dir.join("posteriord.toml");
        std::fs::write(&path, text).expect("config written");
        let log = std::fs::File::create(dir.join("posteriord.log")).expect("log file");
        let child = Command::new(env!("CARGO_BIN_EXE_posteriord"))
            .args(["serve", "--config"])
            .arg(&path)
            .env("RUST_LOG", "warn")
            // The workload's event times are fixed (2026-05-28); received today they are late.
            .env("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS", "3650")
            .stdout(Stdio::null())
            .stderr(log)
            .spawn()
            .expect("posteriord starts");
        Server { child, port }
    }

    fn wait_ready(&mut self, limit: Duration) -> Duration {
        let t = Instant::now();
        while t.elapsed() < limit {
            if let Some((200, _)) = http_get(self.port, "/readyz") {
                return t.elapsed();
            }
            if let Ok(Some(status)) = self.child.try_wait() {
                panic!("posteriord exited early: {status}");
            }
            std::thread::sleep(Duration::from_millis(10));
        }
        panic!("posteriord not ready within {limit:?}");
    }

    fn stop(mut self) {
        // SIGTERM, the way an orchestrator stops it; the drain saves state.
        let _ = Command::new("kill")
            .args(["-TERM", &self.child.id().to_string()])
            .status();
        let _ = self.child.wait();
    }
}

fn restart_target(work: &Path, store_dir: &Path, n: usize, store_bytes: f64) -> Vec<Row> {
    println!("\n== restart: start to ready with {n} units of stored state ==");
    let t = Instant::now();
    let mut buf = Vec::new();
    std::fs::File::open(Store::open(store_dir).expect("store").path("http"))
        .expect("stored shard file opens")
        .read_to_end(&mut buf)
        .expect("stored shard file reads");
    let read = t.elapsed().as_secs_f64();
    drop(buf);
    let config = format!(
        "[store]\ndir = \"{}\"\nsnapshot_interval_ms = 200\n{}",
        store_dir.display(),
        workload_toml(1, 2)
    );
    let mut times = Vec::new();
    let mut service_rss = (0.0, 0.0);
    for round in 0..2 {
        let t = Instant::now();
        let mut server = Server::start(&work.join(format!("restart-{round}")), &config);
        server.wait_ready(Duration::from_secs(300));
        times.push(t.elapsed().as_secs_f64());
        if round == 0 {
            // Working set of the service itself with that state: post events (which makes
            // the state due for saving), let a save run, then read the process's RSS.
            let body = "{\"type\":\"exposure\",\"experiment\":\"orchard-0\",\"variant\":\"v1\",\"unit\":\"late-gardener\",\"time\":\"2026-06-01T08:00:00Z\"}";
            assert_eq!(
                http_request(server.port, "POST", "/v1/events", Some(body)).map(|r| r.0),
                Some(200)
            );
            std::thread::sleep(Duration::from_secs(2));
            let status = std::fs::read_to_string(format!("/proc/{}/status", server.child.id()))
                .unwrap_or_default();
            let field = |name: &str| {
                status
                    .lines()
                    .find(|l| l.starts_with(name))
                    .and_then(|l| l.split_whitespace().nth(1)?.parse::<f64>().ok())
                    .unwrap_or(0.0)
                    / 1024.0
            };
            service_rss = (field("VmRSS:"), field("VmHWM:"));
        }
        server.stop();
    }
    let ours = median(times);
    println!(
        "  the service with this state after a save: RSS {:.0} MiB, peak {:.0} MiB",
        service_rss.0, service_rss.1
    );
    println!(
        "  state file {:.0} MiB; reading it alone {:.2} s; start to ready {ours:.2} s",
        store_bytes / 1048576.0,
        read
    );
    let peak = service_rss.1;
    vec![
        budget_row(
            "4 service peak RSS with the units + a save",
            peak,
            400.0,
            "MiB",
            n >= 10_000_000,
        ),
        Row {
            target: "6 restart to ready (10M units)",
            baseline: format!("read file {read:.2} s"),
            ours: format!("{ours:.2} s"),
            ratio: format!("{:.1}×", ours / read),
            goal: "report",
            met: None,
        },
    ]
}

// ---------------------------------------------------------------------------------------
// Targets 2 and 5: Kafka end to end, and ingest under HTTP read load.

struct Broker {
    brokers: String,
    /// The data folder of a broker this bench started (tests/kafka/broker.sh), stopped on drop.
    started: Option<PathBuf>,
}

fn broker_script() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/kafka/broker.sh")
}

impl Drop for Broker {
    fn drop(&mut self) {
        if let Some(dir) = &self.started {
            let _ = Command::new(broker_script()).arg("stop").arg(dir).status();
        }
    }
}

fn broker(work: &Path) -> Option<Broker> {
    let named = std::env::var("POSTERIORD_BENCH_BROKERS")
        .or_else(|_| std::env::var("POSTERIORD_TEST_BROKERS"));
    if let Ok(b) = named {
        return Some(Broker {
            brokers: b,
            started: None,
        });
    }
    // A one-node Apache Kafka of our own (needs java; the jars are fetched once and cached).
    let dir = work.join("kafka");
    let out = Command::new(broker_script())
        .arg("start")
        .arg(&dir)
        .arg("1")
        .stderr(Stdio::inherit())
        .output()
        .ok()?;
    let broker = Broker {
        brokers: String::from_utf8_lossy(&out.stdout).trim().to_string(),
        started: Some(dir),
    };
    out.status.success().then_some(broker)
}

fn create_topic(brokers: &str, topic: &str) {
    create_topic_with(brokers, topic, 1);
}

/// Create `topic` with `partitions` partitions (replication 1).
fn create_topic_with(brokers: &str, topic: &str, partitions: i32) {
    use rdkafka::admin::{AdminClient, AdminOptions, NewTopic, TopicReplication};
    use rdkafka::client::DefaultClientContext;
    let admin: AdminClient<DefaultClientContext> = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .create()
        .expect("admin client");
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let result = rt.block_on(admin.create_topics(
        &[NewTopic::new(topic, partitions, TopicReplication::Fixed(1))],
        &AdminOptions::new(),
    ));
    result.expect("create_topics answered")[0]
        .as_ref()
        .expect("topic created");
}

fn produce(brokers: &str, topic: &str, events: &[Vec<u8>]) {
    use rdkafka::producer::{BaseProducer, BaseRecord, Producer};
    let producer: BaseProducer = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("linger.ms", "20")
        .set("queue.buffering.max.messages", "1000000")
        .create()
        .expect("producer");
    for e in events {
        loop {
            match producer.send(BaseRecord::<(), [u8]>::to(topic).payload(e)) {
                Ok(()) => break,
                Err((_, _)) => {
                    producer.poll(Duration::from_millis(10));
                }
            }
        }
        producer.poll(Duration::ZERO);
    }
    producer
        .flush(Duration::from_secs(300))
        .expect("all events delivered");
}

/// The baseline: a bare rdkafka consumer loop that receives every message and does nothing.
fn bare_consume(brokers: &str, topic: &str, group: &str, n: usize) -> f64 {
    use rdkafka::consumer::{BaseConsumer, Consumer};
    use rdkafka::Message;
    let t = Instant::now();
    let consumer: BaseConsumer = rdkafka::ClientConfig::new()
        .set("bootstrap.servers", brokers)
        .set("group.id", group)
        .set("auto.offset.reset", "earliest")
        .set("enable.auto.commit", "false")
        .create()
        .expect("consumer");
    consumer.subscribe(&[topic]).expect("subscribe");
    let mut seen = 0usize;
    let mut bytes = 0usize;
    while seen < n {
        if let Some(Ok(m)) = consumer.poll(Duration::from_millis(100)) {
            seen += 1;
            bytes += m.payload().map_or(0, <[u8]>::len);
        }
        assert!(
            t.elapsed() < Duration::from_secs(600),
            "bare consumer stalled"
        );
    }
    std::hint::black_box(bytes);
    t.elapsed().as_secs_f64()
}

/// Sum of the events posteriord counted (applied or not, and refused) from its /metrics.
fn events_counted(port: u16) -> f64 {
    let Some((200, body)) = http_get(port, "/metrics") else {
        return 0.0;
    };
    body.lines()
        .filter(|l| {
            l.starts_with("posteriord_events_total{")
                || l.starts_with("posteriord_events_rejected_total{")
        })
        .filter_map(|l| l.rsplit(' ').next()?.parse::<f64>().ok())
        .sum()
}

/// posteriord consuming the topic from the start; seconds from process start until every
/// message is counted. With `load`, wrk reads an experiment document concurrently.
fn ours_consume(
    work: &Path,
    brokers: &str,
    topic: &str,
    group: &str,
    n: usize,
    load: bool,
) -> (f64, Option<String>) {
    let config = format!(
        "[kafka]\nbrokers = \"{brokers}\"\ntopics = [\"{topic}\"]\ngroup = \"{group}\"\n[store]\ndir = \"{}\"\n{}",
        work.join(format!("store-{group}")).display(),
        workload_toml(20, 4)
    );
    let t = Instant::now();
    let server = Server::start(&work.join(group), &config);
    let mut wrk = None;
    if load {
        // Wait for the listener only, then start the readers before the data flows.
        while http_get(server.port, "/healthz").is_none() {
            std::thread::sleep(Duration::from_millis(5));
        }
        wrk = Some(start_wrk(work, server.port));
    }
    let limit = Duration::from_secs(900);
    loop {
        if events_counted(server.port) >= n as f64 {
            break;
        }
        assert!(t.elapsed() < limit, "posteriord did not consume the topic");
        std::thread::sleep(Duration::from_millis(100));
    }
    let secs = t.elapsed().as_secs_f64();
    let cpu = process_cpu_secs(server.child.id());
    let report = wrk.map(stop_wrk);
    server.stop();
    if !load {
        println!(
            "  posteriord used {cpu:.2} CPU-s for {n} events ({:.0} µs per event, {:.2} cores at this rate)",
            cpu / n as f64 * 1e6,
            cpu / secs
        );
    }
    (secs, report)
}

/// User + system CPU seconds of process `pid` so far (from /proc; clock ticks of 1/100 s).
fn process_cpu_secs(pid: u32) -> f64 {
    let stat = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap_or_default();
    // Fields after the parenthesised command name: state is field 3, utime 14, stime 15.
    let rest = stat.rsplit_once(')').map_or("", |(_, r)| r);
    let fields: Vec<&str> = rest.split_whitespace().collect();
    let ticks = |i: usize| {
        fields
            .get(i)
            .and_then(|v| v.parse::<f64>().ok())
            .unwrap_or(0.0)
    };
    (ticks(11) + ticks(12)) / 100.0
}

fn start_wrk(work: &Path, port: u16) -> Child {
    // A paced reader (wrk's delay hook): 4 connections, a request every 5 ms each, i.e. up
    // to 800 requests/s of the experiment document — steady read traffic, not a flood that
    // would only measure how two cores split between wrk and the broker.
    let script = work.join("paced.lua");
    std::fs::write(&script, "function delay()\n  return 5\nend\n").expect("wrk script");
    Command::new("wrk")
        .args(["-t2", "-c4", "-d600s", "--latency", "-s"])
        .arg(&script)
        .arg(format!("http://127.0.0.1:{port}/v1/experiments/orchard-3"))
        .stdout(Stdio::piped())
        .stderr(Stdio::null())
        .spawn()
        .expect("wrk runs (apt-get install wrk)")
}

fn stop_wrk(mut child: Child) -> String {
    // wrk prints its report on SIGINT.
    let _ = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status();
    let mut out = String::new();
    if let Some(mut s) = child.stdout.take() {
        let _ = s.read_to_string(&mut out);
    }
    let _ = child.wait();
    out
}

fn wrk_summary(report: &str) -> String {
    let pick = |label: &str| {
        report
            .lines()
            .find(|l| l.trim_start().starts_with(label))
            .and_then(|l| l.split_whitespace().nth(1).map(str::to_string))
            .unwrap_or_else(|| "?".into())
    };
    let rate = report
        .lines()
        .find(|l| l.starts_with("Requests/sec"))
        .and_then(|l| l.split_whitespace().nth(1))
        .unwrap_or("?");
    let non2xx = report
        .lines()
        .find(|l| l.contains("Non-2xx"))
        .map_or("0".to_string(), |l| l.trim().to_string());
    format!(
        "{rate} req/s, p50 {}, p99 {}, non-2xx: {non2xx}",
        pick("50%"),
        pick("99%")
    )
}

fn kafka_targets(work: &Path, kafka: bool, http: bool) -> Vec<Row> {
    let n = sized(200_000, 2_000);
    println!("\n== kafka: {n} events through the broker (one partition) ==");
    let Some(b) = broker(work) else {
        println!("  no broker: set POSTERIORD_BENCH_BROKERS, or install java so tests/kafka/broker.sh can start one");
        return vec![Row {
            target: "2 kafka end to end",
            baseline: "-".into(),
            ours: "-".into(),
            ratio: "not run".into(),
            goal: ">= 0.7x",
            met: Some(false),
        }];
    };
    let topic = format!("bench-events-{}", std::process::id());
    create_topic(&b.brokers, &topic);
    let events = workload_events(n, 20, 4);
    let t = Instant::now();
    produce(&b.brokers, &topic, &events);
    println!(
        "  produced in {:.1} s ({:.0} ev/s)",
        t.elapsed().as_secs_f64(),
        n as f64 / t.elapsed().as_secs_f64()
    );
    let mut rows = Vec::new();
    let mut run = 0;
    let mut group = |kind: &str| {
        run += 1;
        format!("bench-{kind}-{}-{run}", std::process::id())
    };
    if kafka {
        let mut bare = Vec::new();
        let mut ours = Vec::new();
        for _ in 0..2 {
            bare.push(bare_consume(&b.brokers, &topic, &group("bare"), n));
            ours.push(ours_consume(work, &b.brokers, &topic, &group("ours"), n, false).0);
        }
        let (bare, ours) = (median(bare), median(ours));
        let rate = |s: f64| format!("{:.0} ev/s", n as f64 / s);
        println!(
            "  bare rdkafka loop: {} ; posteriord serve: {}",
            rate(bare),
            rate(ours)
        );
        rows.push(ratio_row(
            "2 kafka end to end vs bare rdkafka loop",
            rate(bare),
            rate(ours),
            bare / ours,
            ">= 0.7x",
            0.7,
        ));
    }
    if http {
        println!("\n== http: ingest from Kafka with and without paced GET load (wrk) ==");
        let quiet = ours_consume(work, &b.brokers, &topic, &group("quiet"), n, false).0;
        let (loaded, report) = ours_consume(work, &b.brokers, &topic, &group("loaded"), n, true);
        let summary = report
            .as_deref()
            .map_or("no wrk report".into(), wrk_summary);
        let rate = |s: f64| format!("{:.0} ev/s", n as f64 / s);
        println!(
            "  no load: {}; under load: {}; reads: {summary}",
            rate(quiet),
            rate(loaded)
        );
        rows.push(ratio_row(
            "5 ingest under read load vs no load",
            rate(quiet),
            rate(loaded),
            quiet / loaded,
            ">= 0.9x",
            0.9,
        ));
        rows.push(Row {
            target: "5 GET /v1/experiments/{id} latency",
            baseline: "-".into(),
            ours: summary.chars().take(60).collect(),
            ratio: "-".into(),
            goal: "report",
            met: None,
        });
    }
    rows
}

// ---------------------------------------------------------------------------------------
// Target 3: the cost of rule evaluation.

fn evaluation_target() -> Vec<Row> {
    use posteriord::config::{DEFAULT_EVALUATE_EVERY_EVENTS, DEFAULT_EVALUATE_EVERY_SECS};
    use posteriord::decide::evaluation::assess;
    use posteriord::state::cadence::Cadence;
    let experiments = sized(10_000, 200);
    let n = sized(1_000_000, 20_000);
    println!("\n== evaluation: 10 000 experiments × 4 variants (conversion + defect rate), default cadence ==");

    // (a) One evaluation, as the evaluator thread runs it.
    let config = workload_config(1, 4, "");
    let mut shards = Shards::new(config.experiments.iter().cloned());
    let shard = shards.shard_mut("bench-0");
    for e in &workload_events(sized(200_000, 5_000), 1, 4) {
        if let Ok(ev) = posteriord::decode::decode_event(e, 64 * 1024) {
            let _ = shard.apply(&ev);
        }
    }
    let snap = shards.snapshot("orchard-0").expect("configured");
    let rounds = sized(300, 3);
    let (mut full, mut lean) = (Vec::new(), Vec::new());
    for _ in 0..3 {
        let t = CpuTimer::start();
        for _ in 0..rounds {
            let s =
                posteriord::summary::summarize(snap.clone(), posteriord::summary::DEFAULT_LEVEL);
            std::hint::black_box(posteriord::decide::evaluate(&s));
        }
        full.push(t.secs() / rounds as f64);
        let t = CpuTimer::start();
        for _ in 0..rounds {
            std::hint::black_box(assess(snap.clone()));
        }
        lean.push(t.secs() / rounds as f64);
    }
    let (full, cost) = (fastest(full), fastest(lean));
    println!(
        "  one evaluation: {:.0} µs (the evaluator's summary; the full summary of the API takes {:.0} µs)",
        cost * 1e6,
        full * 1e6
    );

    // (b) The ingest path with the cadence on (per-event check, snapshots of due experiments
    // handed to a thread) against off. Events at 5 000 per second of event time, so every
    // experiment comes due several times in the stream (one snapshot per ~30 events).
    let config = workload_config(experiments, 4, "");
    let events = workload_events_at(n, experiments, 4, 5_000);
    let cadence = Cadence::new(
        DEFAULT_EVALUATE_EVERY_SECS as i64 * 1_000_000,
        DEFAULT_EVALUATE_EVERY_EVENTS,
    );
    let run = |cadence: Option<&Cadence>| -> (f64, usize) {
        let shards = Mutex::new(Shards::new(config.experiments.iter().cloned()));
        let (tx, rx) = std::sync::mpsc::channel();
        let sink = std::thread::spawn(move || rx.iter().count());
        let t = CpuTimer::start();
        ingest_into(&shards, &events, cadence, |snapshot| {
            let _ = tx.send(snapshot);
        });
        let secs = t.secs();
        drop(tx);
        (secs, sink.join().expect("sink thread"))
    };
    let (mut off, mut on, mut due) = (Vec::new(), Vec::new(), 0);
    for _ in 0..5 {
        off.push(run(None).0);
        let (secs, n) = run(Some(&cadence));
        on.push(secs);
        due = n;
    }
    let (off, on) = (fastest(off), fastest(on));
    println!(
        "  ingest path: off {:.2} M ev/s, cadence on {:.2} M ev/s ({due} due snapshots, one per {:.0} events)",
        n as f64 / off / 1e6,
        n as f64 / on / 1e6,
        n as f64 / due.max(1) as f64
    );

    // (c) Steady state at full speed. Live, events arrive at the ingest rate R with their own
    // times; an experiment is due every T of event time or every N_e of its events, and each
    // evaluation restarts both, so it is evaluated max(1/T, r/N_e) times a second at event
    // rate r. With this workload's traffic spread evenly over E experiments that is
    // max(E/T, R/N_e) evaluations a second (E/T + R/N_e bounds it for any spread), each
    // costing `cost` on the evaluator thread. Charged to the ingest core, the throughput with
    // evaluation is 1 / (i_on + cost·evaluations/R) against 1 / i_off without.
    let i_off = off / n as f64;
    let i_on = on / n as f64;
    let r = 1.0 / i_off;
    let by_time = experiments as f64 / DEFAULT_EVALUATE_EVERY_SECS as f64;
    let by_count = r / DEFAULT_EVALUATE_EVERY_EVENTS as f64;
    let even = by_time.max(by_count);
    let bound = by_time + by_count;
    let keeps = |per_sec: f64| i_off / (i_on + cost * per_sec / r);
    let ratio = keeps(even);
    println!(
        "  at full speed ({:.2} M ev/s): {even:.0} evaluations/s (≤ {bound:.0} for any spread of the traffic) = {:.1}% (≤ {:.1}%) of a core on the evaluator thread; on one shared core ingest keeps {:.1}% (≥ {:.1}%) of its throughput",
        r / 1e6,
        100.0 * cost * even,
        100.0 * cost * bound,
        100.0 * ratio,
        100.0 * keeps(bound)
    );
    vec![
        ratio_row(
            "3 ingest, evaluation on (own thread) vs off",
            format!("{:.2} M ev/s", n as f64 / off / 1e6),
            format!("{:.2} M ev/s", n as f64 / on / 1e6),
            off / on,
            ">= 0.9x",
            0.9,
        ),
        ratio_row(
            "3 ingest with evaluation (one core) vs without",
            format!("{:.2} M ev/s", r / 1e6),
            format!("{:.2} M ev/s", ratio * r / 1e6),
            ratio,
            ">= 0.9x",
            0.9,
        ),
        Row {
            target: "3 one evaluation (4 variants, 2 metrics)",
            baseline: format!("full summary {:.0} µs", full * 1e6),
            ours: format!("{:.0} µs", cost * 1e6),
            ratio: format!("{:.2}×", full / cost),
            goal: "report",
            met: None,
        },
    ]
}
