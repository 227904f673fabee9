//! `posteriord replay`: feed recorded NDJSON events through the service's own pipeline
//! (decode → state → cadence → summarize → evaluate → alert book), synchronously and in file
//! order — or, for the per-topic dumps of one partition of co-partitioned topics, merged by
//! reference time as the live consumer applies them — with the events' own times driving the
//! cadence, hold-downs and durations. On a single-partition stream it decides exactly what
//! the live service decided.

use std::io::{BufRead, BufReader, Read};
use std::path::PathBuf;
use std::sync::Mutex;

use serde_json::{json, Value};

use crate::config::Config;
use crate::decide::alerts::{AlertBook, AlertChange};
use crate::decide::evaluation::{evaluate_snapshot, Reading};
use crate::event::Micros;
use crate::event::Outcome;
use crate::service::clock::SourceClock;
use crate::service::ingest::{apply_batch_checked, Item};
use crate::service::metrics::{Metrics, Source};
use crate::state::partials::{Merger, Partial};
use crate::state::shards::{ShardId, Shards};

/// The shard replayed events are applied to.
pub const REPLAY_SHARD: &str = "replay";

/// Lines decoded and applied per batch: large enough to amortise the lock, small enough that
/// the snapshot of a due experiment is still taken at the event that made it due (the ingest
/// path does that per event regardless of batch size).
const BATCH_LINES: usize = 4096;

/// Listed bad lines are capped so a wholly wrong file does not flood the output; all are counted.
pub const MAX_LISTED_BAD_LINES: usize = 1000;

/// Where events come from.
#[derive(Debug, Clone)]
pub enum Input {
    /// A file.
    File(PathBuf),
    /// Standard input (`-`).
    Stdin,
}

impl Input {
    /// `-` is standard input, anything else a path.
    pub fn parse(arg: &str) -> Input {
        if arg == "-" {
            Input::Stdin
        } else {
            Input::File(PathBuf::from(arg))
        }
    }

    /// How the input is named in reports.
    pub fn name(&self) -> String {
        match self {
            Input::File(p) => p.display().to_string(),
            Input::Stdin => "-".into(),
        }
    }
}

/// Why a replay could not run.
#[derive(Debug, thiserror::Error)]
pub enum ReplayError {
    /// An input could not be opened or read.
    #[error("cannot read {name}: {source}")]
    Read {
        /// The input.
        name: String,
        /// The I/O error.
        source: std::io::Error,
    },
}

/// A line that was not applied because it is not a valid event.
#[derive(Debug, Clone, PartialEq)]
pub struct BadLine {
    /// Input name.
    pub input: String,
    /// 1-based line number within that input.
    pub line: u64,
    /// Stable reason name.
    pub reason: &'static str,
    /// What is wrong.
    pub message: String,
}

/// One alert change, as it happened during the replay.
#[derive(Debug, Clone)]
pub struct Decision {
    /// Input and 1-based line of the event that made the experiment due.
    pub input: String,
    /// Line number.
    pub line: u64,
    /// The change.
    pub change: AlertChange,
}

/// Everything a replay found.
#[derive(Debug)]
pub struct ReplayReport {
    /// Lines read (blank lines included).
    pub lines: u64,
    /// Valid events, by outcome (indexed like `Outcome::ALL`).
    pub outcomes: [u64; Outcome::ALL.len()],
    /// Outcomes counted as `held` in `outcomes` and decided later, by what deciding them
    /// did (only with `--merge-by-reference`, where outcomes wait for the assignments).
    pub held_decided: [u64; Outcome::ALL.len()],
    /// Bad lines counted.
    pub bad: u64,
    /// The first [`MAX_LISTED_BAD_LINES`] bad lines.
    pub bad_lines: Vec<BadLine>,
    /// Evaluations run.
    pub evaluations: u64,
    /// Every alert change, in order.
    pub decisions: Vec<Decision>,
    /// The alert book at the end.
    pub book: AlertBook,
    /// Each experiment's reading (summary and the rules that hold) at the end of the input.
    pub experiments: Vec<Reading>,
    /// What the event-time check found (`[event_time.kafka]` bounds).
    pub clock: SourceClock,
}

/// A line's reference column, if it has one: `(reference, where the event starts)`.
///
/// A line is either an event (starting with `{`), or `REFERENCE<TAB>EVENT`, where REFERENCE
/// is the time the event's time is checked against, as a topic dump prints a record's
/// timestamp: integer milliseconds since the epoch, optionally labelled `CreateTime:` or
/// `LogAppendTime:` (`kafka-console-consumer --property print.timestamp=true`; `-1` or
/// `NoTimestampType:-1` for none), or an RFC 3339 time. Events without a reference are
/// applied unchecked (see docs/events.md).
pub fn split_reference(line: &[u8]) -> Result<(Option<Micros>, usize), String> {
    let first = line
        .iter()
        .position(|b| !b.is_ascii_whitespace())
        .unwrap_or(0);
    if line.get(first) == Some(&b'{') {
        return Ok((None, 0));
    }
    let Some(tab) = line.iter().position(|&b| b == b'\t') else {
        // Not an event line either: the decoder says why.
        return Ok((None, 0));
    };
    let column = std::str::from_utf8(&line[..tab])
        .map_err(|_| "the reference column is not UTF-8".to_string())?
        .trim();
    let value = column
        .strip_prefix("CreateTime:")
        .or_else(|| column.strip_prefix("LogAppendTime:"))
        .or_else(|| column.strip_prefix("NoTimestampType:"))
        .unwrap_or(column);
    let reference = if let Ok(ms) = value.parse::<i64>() {
        (ms >= 0).then(|| ms.saturating_mul(1_000))
    } else {
        Some(
            crate::decode::parse_time(value)
                .map_err(|_| format!("reference column {column:?} is neither milliseconds since the epoch nor an RFC 3339 time"))?,
        )
    };
    Ok((reference, tab + 1))
}

/// Observes progress, in bytes read.
pub trait Progress {
    /// `n` more bytes were read.
    fn advance(&self, n: u64);
}

impl Progress for () {
    fn advance(&self, _: u64) {}
}

impl Progress for indicatif::ProgressBar {
    fn advance(&self, n: u64) {
        self.inc(n);
    }
}

/// An input written `SOURCE=FILE`, where SOURCE names a `[[source]]` of the config, reads
/// under that source's mapping; any other input reads in the built-in format.
fn with_source<'c>(
    config: &'c Config,
    input: &Input,
) -> (Option<&'c crate::mapping::Mapping>, Input) {
    if let Input::File(p) = input {
        if let Some((source, path)) = p.to_str().and_then(|s| s.split_once('=')) {
            if let Some(s) = config.source(source) {
                return (Some(&s.mapping), Input::parse(path));
            }
        }
    }
    (None, input.clone())
}

/// One non-blank line read from an input, with its reference column split off.
struct Line {
    /// Index of its input.
    input: usize,
    /// 1-based line number in that input.
    number: u64,
    bytes: Vec<u8>,
    /// Where the event starts (after the reference column).
    start: usize,
    reference: Option<Micros>,
}

/// An open input: its reader and how far it has been read.
struct Open<'c> {
    name: String,
    /// The `[[source]]` mapping it is read under (`SOURCE=FILE`), if any.
    mapping: Option<&'c crate::mapping::Mapping>,
    reader: BufReader<Box<dyn Read>>,
    line_no: u64,
    /// Lines applied from this input so far: the next line's offset in its own stream.
    offset: i64,
}

/// Inputs read one after another (file order), or merged by reference time.
struct Lines<'c> {
    open: Vec<Open<'c>>,
    /// Merged: each input's next line, read ahead; `None` once the input is done.
    heads: Vec<Option<Line>>,
    merge: bool,
    /// Sequential: the input being read.
    current: usize,
}

impl Lines<'_> {
    /// The next non-blank line of input `k` (bad reference columns are reported into
    /// `report` and skipped), or `None` at its end.
    fn read(
        &mut self,
        k: usize,
        report: &mut ReplayReport,
        progress: &dyn Progress,
    ) -> Result<Option<Line>, ReplayError> {
        let o = &mut self.open[k];
        loop {
            let mut buf = Vec::new();
            let n = o
                .reader
                .read_until(b'\n', &mut buf)
                .map_err(|source| ReplayError::Read {
                    name: o.name.clone(),
                    source,
                })?;
            if n == 0 {
                return Ok(None);
            }
            progress.advance(n as u64);
            o.line_no += 1;
            report.lines += 1;
            while buf.last().is_some_and(|b| *b == b'\n' || *b == b'\r') {
                buf.pop();
            }
            if buf.iter().all(|b| b.is_ascii_whitespace()) {
                continue;
            }
            match split_reference(&buf) {
                Ok((reference, start)) => {
                    return Ok(Some(Line {
                        input: k,
                        number: o.line_no,
                        bytes: buf,
                        start,
                        reference,
                    }))
                }
                Err(message) => {
                    report.bad += 1;
                    if report.bad_lines.len() < MAX_LISTED_BAD_LINES {
                        report.bad_lines.push(BadLine {
                            input: o.name.clone(),
                            line: o.line_no,
                            reason: "bad_reference",
                            message,
                        });
                    }
                }
            }
        }
    }

    /// The next line to apply: in file order, or merged — the input whose next line has the
    /// smallest (reference, position on the command line) goes next, each input in its own
    /// line order (as the live consumer merges its topics; no reference sorts first).
    fn next(
        &mut self,
        report: &mut ReplayReport,
        progress: &dyn Progress,
    ) -> Result<Option<Line>, ReplayError> {
        if !self.merge {
            while self.current < self.open.len() {
                if let Some(line) = self.read(self.current, report, progress)? {
                    return Ok(Some(line));
                }
                self.current += 1;
            }
            return Ok(None);
        }
        if self.heads.is_empty() {
            for k in 0..self.open.len() {
                let head = self.read(k, report, progress)?;
                self.heads.push(head);
            }
        }
        let best = self
            .heads
            .iter()
            .enumerate()
            .filter_map(|(k, h)| h.as_ref().map(|l| (l.reference.unwrap_or(i64::MIN), k)))
            .min();
        let Some((_, k)) = best else { return Ok(None) };
        let line = self.heads[k].take();
        self.heads[k] = self.read(k, report, progress)?;
        Ok(line)
    }
}

/// Replay `inputs`, in order, through the pipeline configured by `config`; with
/// `merge_by_reference`, `inputs` are the dumps of one partition of several
/// co-partitioned topics (one file per topic, in the order of the topics in the config) and
/// their lines are applied merged by (reference column, position of the file on the command
/// line, line order) — the order the live consumer applies the same records in — each file
/// as its own stream, so outcomes wait for the assignments as they did live.
pub fn replay(
    config: &Config,
    inputs: &[Input],
    merge_by_reference: bool,
    progress: &dyn Progress,
) -> Result<ReplayReport, ReplayError> {
    let order = if merge_by_reference {
        Order::MergeByReference
    } else {
        Order::Files
    };
    replay_in(config, inputs, order, progress)
}

/// Replay the dumps of a unit-keyed topic's partitions, `inputs[i]` being partition `i`'s
/// records in log order with their record timestamps (the reference column), the way a
/// consumer group decides them: each partition's totals as of every reference-time boundary
/// (`evaluate_every_secs`), merged, and each experiment evaluated at every boundary all
/// partitions have passed, in order (docs/operations.md, "One experiment across instances").
/// Decisions name the boundary, not a line.
pub fn replay_partitioned(
    config: &Config,
    inputs: &[Input],
    progress: &dyn Progress,
) -> Result<ReplayReport, ReplayError> {
    replay_in(config, inputs, Order::Partitioned, progress)
}

/// How the inputs of a replay are applied.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Order {
    /// One after another, to one shard.
    Files,
    /// Merged by reference time, to one shard, each input a stream of its own.
    MergeByReference,
    /// Each input the shard of one partition keeping boundaries, decided by a merger.
    Partitioned,
}

fn replay_in(
    config: &Config,
    inputs: &[Input],
    order: Order,
    progress: &dyn Progress,
) -> Result<ReplayReport, ReplayError> {
    let merge_by_reference = order == Order::MergeByReference;
    let partitioned = order == Order::Partitioned;
    let shards = Mutex::new({
        let mut shards = Shards::new(config.experiments.iter().cloned());
        if let Some(k) = &config.kafka {
            shards.set_lateness(i64::try_from(k.outcome_lateness.as_micros()).unwrap_or(i64::MAX));
        }
        if partitioned {
            shards.keep_boundaries(config.alerts.cadence().every);
        }
        shards
    });
    // Partitioned: input `i` is the shard of partition `i`.
    let shard_names: Vec<String> = (0..inputs.len())
        .map(|i| ShardId::co_partitioned(i as i32).as_str().to_string())
        .collect();
    let metrics = Metrics::new();
    let cadence = config.alerts.cadence();
    let max_event_bytes = config.max_event_bytes();
    let mut report = ReplayReport {
        lines: 0,
        outcomes: [0; Outcome::ALL.len()],
        held_decided: [0; Outcome::ALL.len()],
        bad: 0,
        bad_lines: Vec::new(),
        evaluations: 0,
        decisions: Vec::new(),
        book: config.alerts.alert_book(),
        experiments: Vec::new(),
        clock: SourceClock::default(),
    };
    // The inputs applied together, in order: all of them, or (partitioned) one group per
    // partition, an argument's comma-separated files being that partition's topics.
    let groups: Vec<Vec<Input>> = if partitioned {
        inputs
            .iter()
            .map(|input| match input {
                Input::File(p) => match p.to_str() {
                    Some(text) if text.contains(',') => text.split(',').map(Input::parse).collect(),
                    _ => vec![input.clone()],
                },
                Input::Stdin => vec![input.clone()],
            })
            .collect()
    } else {
        vec![inputs.to_vec()]
    };
    for (gi, group) in groups.iter().enumerate() {
        let mut open = Vec::with_capacity(group.len());
        for input in group {
            let (mapping, input) = with_source(config, input);
            let name = input.name();
            let reader: Box<dyn Read> = match &input {
                Input::File(p) => {
                    Box::new(std::fs::File::open(p).map_err(|source| ReplayError::Read {
                        name: name.clone(),
                        source,
                    })?)
                }
                Input::Stdin => Box::new(std::io::stdin()),
            };
            open.push(Open {
                name,
                mapping,
                reader: BufReader::with_capacity(1 << 16, reader),
                line_no: 0,
                offset: 0,
            });
        }
        let mut lines = Lines {
            open,
            heads: Vec::new(),
            merge: merge_by_reference || (partitioned && group.len() > 1),
            current: 0,
        };
        // Each merged input is its own stream of the shard, named by its position.
        let streams: Vec<String> = (0..group.len()).map(|k| format!("input-{k}")).collect();
        let mut offset: i64 = 0;
        loop {
            let mut batch: Vec<Line> = Vec::with_capacity(BATCH_LINES);
            while batch.len() < BATCH_LINES {
                match lines.next(&mut report, progress)? {
                    Some(line) => batch.push(line),
                    None => break,
                }
            }
            if batch.is_empty() {
                break;
            }
            let items: Vec<Item<'_>> = batch
                .iter()
                .map(|line| {
                    let o = &mut lines.open[line.input];
                    let (item_offset, topic) = if merge_by_reference || partitioned {
                        o.offset += 1;
                        (o.offset - 1, Some(streams[line.input].as_str()))
                    } else {
                        offset += 1;
                        (offset - 1, None)
                    };
                    Item {
                        shard: if partitioned {
                            &shard_names[gi]
                        } else {
                            REPLAY_SHARD
                        },
                        offset: Some(item_offset),
                        bytes: &line.bytes[line.start..],
                        mapping: o.mapping,
                        topic,
                        reference: line.reference,
                    }
                })
                .collect();
            let applied = apply_batch_checked(
                &shards,
                &metrics,
                Source::Kafka,
                &items,
                max_event_bytes,
                Some(&cadence),
                &config.event_time.kafka,
            );
            for (i, result) in applied.results.iter().enumerate() {
                match result {
                    Some(Ok(o)) => {
                        let k = Outcome::ALL.iter().position(|x| x == o).unwrap_or(0);
                        report.outcomes[k] += 1;
                    }
                    Some(Err(reject)) => {
                        report.bad += 1;
                        if report.bad_lines.len() < MAX_LISTED_BAD_LINES {
                            report.bad_lines.push(BadLine {
                                input: lines.open[batch[i].input].name.clone(),
                                line: batch[i].number,
                                reason: reject.reason.as_str(),
                                message: reject.message.to_string(),
                            });
                        }
                    }
                    None => {}
                }
            }
            for (_, decided) in &applied.released {
                if let Ok(o) = decided {
                    let k = Outcome::ALL.iter().position(|x| x == o).unwrap_or(0);
                    report.held_decided[k] += 1;
                }
            }
            // Due snapshots are in input order, each with the batch index of the event that
            // made it due, which maps back to that event's input and line.
            for (snapshot, item) in applied.due.into_iter().zip(applied.due_items) {
                let (input, line) = batch
                    .get(item)
                    .map(|l| (lines.open[l.input].name.clone(), l.number))
                    .unwrap_or_default();
                report.evaluations += 1;
                let evaluation = evaluate_snapshot(&mut report.book, snapshot);
                for change in evaluation.changes {
                    report.decisions.push(Decision {
                        input: input.clone(),
                        line,
                        change,
                    });
                }
            }
        }
    }
    report.clock = metrics.clock.of(Source::Kafka);
    let mut shards = shards.into_inner().unwrap_or_else(|p| p.into_inner());
    if partitioned {
        // The end of a dump is a partition that has gone quiet: live, its idle declaration
        // passes the boundary after its last record, with its final totals.
        let every = config.alerts.cadence().every.max(1);
        for name in &shard_names {
            if let Some(shard) = shards.shard_mut_if_present(name) {
                if let Some(w) = shard.boundaries().and_then(|b| b.watermark()) {
                    shard.pass_reference((w.div_euclid(every) + 1) * every);
                }
            }
        }
        evaluate_boundaries(&shards, groups.len(), &mut report);
    }
    report.experiments = shards
        .snapshots()
        .into_iter()
        .map(|snap| Reading::of(snap, crate::summary::DEFAULT_LEVEL))
        .collect();
    Ok(report)
}

/// The owner's side of a partitioned replay: per experiment, every partition's totals as of
/// each boundary, merged, and evaluated at every boundary all `n` partitions passed, in order.
fn evaluate_boundaries(shards: &Shards, n: usize, report: &mut ReplayReport) {
    for def in shards.defs() {
        let key = def.state_key();
        let empty = crate::state::ExperimentState::new(std::sync::Arc::clone(def)).snapshot();
        let mut merger = Merger::new(n as u32, empty);
        for p in 0..n {
            let Some(shard) = shards.shard(ShardId::co_partitioned(p as i32).as_str()) else {
                continue;
            };
            let Some(b) = shard.boundaries() else {
                continue;
            };
            let Some(watermark) = b.watermark() else {
                continue;
            };
            merger.offer(Partial {
                partition: p as u32,
                positions: vec![shard.next_offset().unwrap_or(0)],
                watermark,
                as_of: b.entries(&key).to_vec(),
            });
        }
        for boundary in merger.ready() {
            let snapshot = merger.totals_at(boundary);
            merger.evaluated(boundary);
            if snapshot.is_empty() {
                continue;
            }
            report.evaluations += 1;
            let evaluation = evaluate_snapshot(&mut report.book, snapshot);
            for change in evaluation.changes {
                report.decisions.push(Decision {
                    input: format!(
                        "boundary {}",
                        crate::doc::time_text(boundary).unwrap_or_else(|| boundary.to_string())
                    ),
                    line: 0,
                    change,
                });
            }
        }
    }
}

fn decision_doc(d: &Decision) -> Value {
    let (change, alert) = match &d.change {
        AlertChange::Opened(a) => ("opened", a),
        AlertChange::Closed(a) => ("closed", a),
    };
    let mut doc = crate::doc::alert(alert);
    if let Value::Object(m) = &mut doc {
        m.insert("change".into(), json!(change));
        m.insert("input".into(), json!(d.input));
        m.insert("line".into(), json!(d.line));
    }
    doc
}

/// The report as JSON.
pub fn to_json(report: &ReplayReport) -> Value {
    let mut outcomes = serde_json::Map::new();
    for (o, n) in Outcome::ALL.iter().zip(report.outcomes) {
        outcomes.insert(o.as_str().into(), json!(n));
    }
    let mut held_decided = serde_json::Map::new();
    for (o, n) in Outcome::ALL.iter().zip(report.held_decided) {
        if n > 0 {
            held_decided.insert(o.as_str().into(), json!(n));
        }
    }
    json!({
        "input": {
            "lines": report.lines,
            "events": report.outcomes.iter().sum::<u64>(),
            "outcomes": outcomes,
            "held_decided": held_decided,
            "bad_lines": report.bad,
        },
        "errors": report.bad_lines.iter().map(|b| json!({
            "input": b.input, "line": b.line, "reason": b.reason, "message": b.message,
        })).collect::<Vec<_>>(),
        "evaluations": report.evaluations,
        "event_time": crate::service::clock::source_json(&report.clock),
        "decisions": report.decisions.iter().map(decision_doc).collect::<Vec<_>>(),
        "alerts": report.book.alerts().iter().map(crate::doc::alert).collect::<Vec<_>>(),
        "experiments": report
            .experiments
            .iter()
            .map(|r| crate::doc::experiment_document(r, Some(report.book.evidence())))
            .collect::<Vec<_>>(),
        "caution": crate::doc::CAUTION,
    })
}

/// Each variant by name with its units and, per metric, its final posterior: the
/// distribution's parameters, the posterior mean and the credible interval, conversion rates
/// in % and defect rates per unit of exposure.
fn final_posteriors(summary: &crate::summary::ExperimentSummary) -> String {
    use std::fmt::Write;
    let snap = &summary.snapshot;
    let def = &snap.def;
    let mut out = String::new();
    for (v, variant) in def.variants.iter().enumerate() {
        let _ = writeln!(
            out,
            "    {}{}: {} units",
            variant.name,
            if v == def.control { " (control)" } else { "" },
            snap.units.get(v).copied().unwrap_or(0)
        );
        for (metric, ms) in def.metrics.iter().zip(&summary.metrics) {
            let params = match ms.posteriors.as_ref() {
                Ok(crate::stats::Arms::Beta(b)) => b
                    .get(v)
                    .map(|p| format!("Beta({}, {})", p.alpha(), p.beta())),
                Ok(crate::stats::Arms::Gamma(g)) => g
                    .get(v)
                    .map(|p| format!("Gamma({}, {})", p.shape(), p.rate())),
                Err(e) => Some(format!("not computed: {e}")),
            };
            let numbers = ms.arms.as_ref().ok().and_then(|a| a.get(v)).map(|a| {
                let level = a.interval.level * 100.0;
                match metric.kind {
                    crate::experiment::MetricKind::Conversion => format!(
                        "posterior mean {:.3}%, {level:.0}% interval {:.3}% to {:.3}%",
                        a.mean * 100.0,
                        a.interval.lower * 100.0,
                        a.interval.upper * 100.0
                    ),
                    crate::experiment::MetricKind::DefectRate(_) => format!(
                        "posterior mean {:.4e}, {level:.0}% interval {:.4e} to {:.4e} per unit of exposure",
                        a.mean, a.interval.lower, a.interval.upper
                    ),
                }
            });
            let _ = writeln!(
                out,
                "      {:<16} {}{}",
                metric.name,
                params.unwrap_or_default(),
                numbers.map(|n| format!("; {n}")).unwrap_or_default()
            );
        }
    }
    out
}

/// The report as text for a person.
pub fn to_text(report: &ReplayReport) -> String {
    use std::fmt::Write;
    let mut out = String::new();
    let events: u64 = report.outcomes.iter().sum();
    let applied = report.outcomes[0];
    let _ = writeln!(
        out,
        "replayed {} lines: {events} valid events ({applied} applied), {} bad line{} skipped, {} evaluations",
        report.lines,
        report.bad,
        if report.bad == 1 { "" } else { "s" },
        report.evaluations
    );
    let c = &report.clock;
    if c.unchecked > 0 {
        let _ = writeln!(
            out,
            "  {} timed events had no reference column and were applied unchecked (see docs/events.md)",
            c.unchecked
        );
    }
    if c.checked > 0 {
        let _ = writeln!(
            out,
            "  event time: {} checked; refused {} ahead, {} behind; clamped {} ahead, {} behind",
            c.checked, c.refused[0], c.refused[1], c.clamped[0], c.clamped[1]
        );
    }
    for b in &report.bad_lines {
        let _ = writeln!(
            out,
            "  bad line {}:{}: {} ({})",
            b.input, b.line, b.message, b.reason
        );
    }
    if report.bad > report.bad_lines.len() as u64 {
        let _ = writeln!(
            out,
            "  … and {} more bad lines",
            report.bad - report.bad_lines.len() as u64
        );
    }
    let _ = writeln!(out, "\ndecisions ({}):", report.decisions.len());
    for d in &report.decisions {
        let (change, a) = match &d.change {
            AlertChange::Opened(a) => ("opened", a),
            AlertChange::Closed(a) => ("closed", a),
        };
        let at = match &d.change {
            AlertChange::Opened(a) => a.opened_at,
            AlertChange::Closed(a) => a.closed_at.unwrap_or(a.last_held_at),
        };
        let _ = writeln!(
            out,
            "  {} {change:<6} {:<12} {}{}{}  (at {})\n      {} = {:.6} vs {} — {}",
            crate::doc::time_text(at).unwrap_or_else(|| at.to_string()),
            a.key.rule.as_str(),
            a.key.experiment,
            a.key
                .metric
                .as_deref()
                .map(|m| format!(" / {m}"))
                .unwrap_or_default(),
            a.key
                .variant
                .as_deref()
                .map(|v| format!(" / {v}"))
                .unwrap_or_default(),
            if d.line == 0 {
                d.input.clone()
            } else {
                format!("{}:{}", d.input, d.line)
            },
            a.finding.test,
            a.finding.value,
            a.finding.threshold,
            a.message_now()
        );
    }
    let _ = writeln!(out, "\nfinal state:");
    for Reading { summary, findings } in &report.experiments {
        // The anytime-valid processes as of the last due point (they advance only there).
        let mut findings = findings.clone();
        crate::decide::add_evidence_findings(summary, report.book.evidence(), &mut findings);
        let findings = &findings;
        let snap = &summary.snapshot;
        let _ = writeln!(
            out,
            "  {}: rules holding now: {}",
            snap.def.id,
            if findings.is_empty() {
                "none".to_string()
            } else {
                findings
                    .iter()
                    .map(|f| f.rule.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            }
        );
        let def = &snap.def;
        out.push_str(&final_posteriors(summary));
        for st in
            crate::decide::standing::standings(summary, findings, Some(report.book.evidence()))
        {
            let _ = writeln!(
                out,
                "    {:<14} {:<28} {:<10} {}",
                st.rule.as_str(),
                [
                    st.metric.map(|m| def.metrics[m].name.as_str()),
                    st.variant.map(|v| def.variants[v].name.as_str()),
                ]
                .into_iter()
                .flatten()
                .collect::<Vec<_>>()
                .join(" / "),
                st.state.as_str(),
                st.detail
            );
        }
    }
    let _ = writeln!(out, "\n{}", crate::doc::CAUTION);
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    /// An invented seed-swap club's assignment stream and its members' activity stream.
    const CONFIG: &str = r#"
[[experiment]]
id = "fern-onboarding"
variants = [ { name = "control" }, { name = "guided" } ]
[[experiment.metric]]
name = "signup"
kind = "conversion"

[[source]]
name = "club-assign"
unit = "u"
time = "ms"
time_format = "epoch_millis"
experiment = "e"
variant = "v"
exposures = ["assigned"]
constants = { event = "assigned" }

[[source]]
name = "club-activity"
unit = "u"
time = "ms"
time_format = "epoch_millis"
event = "k"
metrics = { "signed" = "signup" }
"#;

    fn successes(report: &ReplayReport) -> u64 {
        match &report.experiments[0].summary.snapshot.metrics[0] {
            crate::state::MetricTotals::Conversion(v) => v.iter().map(|t| t.successes).sum(),
            other => panic!("a conversion metric: {other:?}"),
        }
    }

    #[test]
    fn merged_dumps_hold_outcomes_in_reference_order_and_file_order_does_not() {
        let dir = tempfile::tempdir().unwrap();
        let config = Config::parse(CONFIG, "club.toml", &[]).unwrap();
        let assign = dir.path().join("assign.ndjson");
        let activity = dir.path().join("activity.ndjson");
        // Stamps: assignment u1 at 1 s, signup u1 at 2 s, assignment u2 at 5 s, signup u2 at
        // 6 s (event times 1, 2.5, 5 and 6.5 s), and one line with a broken reference column.
        std::fs::write(
            &assign,
            "1000\t{\"u\":\"u1\",\"ms\":1000,\"e\":\"fern-onboarding\",\"v\":\"control\"}\n\
             5000\t{\"u\":\"u2\",\"ms\":5000,\"e\":\"fern-onboarding\",\"v\":\"guided\"}\n",
        )
        .unwrap();
        std::fs::write(
            &activity,
            "2000\t{\"u\":\"u1\",\"ms\":2500,\"k\":\"signed\"}\n\
             soon\t{\"u\":\"u3\",\"ms\":2500,\"k\":\"signed\"}\n\
             6000\t{\"u\":\"u2\",\"ms\":6500,\"k\":\"signed\"}\n",
        )
        .unwrap();
        let inputs = [
            Input::parse(&format!("club-assign={}", assign.display())),
            Input::parse(&format!("club-activity={}", activity.display())),
        ];
        let held = Outcome::ALL
            .iter()
            .position(|o| *o == Outcome::Held)
            .unwrap();
        let applied = Outcome::ALL
            .iter()
            .position(|o| *o == Outcome::Applied)
            .unwrap();
        // Merged: u1's signup (stamped 2 s) waits for the assignments to pass its second,
        // which u2's (stamped 5 s) does; u2's signup waits for an assignment still to come.
        let merged = replay(&config, &inputs, true, &()).unwrap();
        assert_eq!(merged.outcomes[held], 2);
        assert_eq!(merged.held_decided[applied], 1);
        assert_eq!(successes(&merged), 1);
        assert_eq!(merged.bad_lines.len(), 1);
        assert_eq!(merged.bad_lines[0].line, 2);
        assert!(merged.bad_lines[0].input.ends_with("activity.ndjson"));
        // File order: every assignment first, so nothing waits and both signups count.
        let sequential = replay(&config, &inputs, false, &()).unwrap();
        assert_eq!(sequential.outcomes[held], 0);
        assert_eq!(successes(&sequential), 2);
    }
}
