//! One experiment decided across the instances of a consumer group (docs/scaling-design.md):
//! each co-partitioned shard publishes its experiments' cumulative totals as of reference-time
//! boundaries (partials), every instance follows them, and the owner of an experiment — the
//! instance holding input partition `hash(id) mod N` — evaluates each boundary once every
//! partition has passed it, on the merged totals as of it, and acknowledges it so the shards
//! prune what is no longer needed. The transport (a compacted Kafka topic) is the edge's; this
//! module encodes and decodes its messages and keeps the mergers.
//!
//! Messages (key → JSON value), all on one topic partition so they are read in publish order:
//! - `p/<partition>`: a shard's heartbeat `{position, watermark}` (its input position — the
//!   sum of its topics' next offsets, which only grows — and reference-time watermark);
//! - `e/<experiment state key>/<partition>`: a partial `{position, watermark, as_of}` with the
//!   shard's unacknowledged entries `[[boundary, totals], …]`;
//! - `a/<experiment state key>`: the owner's acknowledgement `{evaluated}`.
//!
//! Totals travel with exposures as IEEE bits, so merged sums are bit-identical to `replay`'s.

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex};

use serde_json::{json, Value};

use super::{lock, Service};
use crate::event::Micros;
use crate::experiment::ExperimentDef;
use crate::state::partials::{Merger, Offered, Partial};
use crate::state::shards::ShardId;
use crate::state::{
    ConversionTotals, DefectTotals, ExperimentSnapshot, ExperimentState, MetricTotals,
    OutcomeCounts,
};

/// A message for the partials topic.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct GroupMessage {
    /// The record key (compaction keeps the latest value per key).
    pub key: String,
    /// The JSON value.
    pub value: Vec<u8>,
}

/// The experiment id of a state key (`id` or `id~generation`).
fn id_of(state_key: &str) -> &str {
    state_key.split('~').next().unwrap_or(state_key)
}

/// The input partition whose holder owns experiment `id` among `n` partitions.
pub fn owner_partition(id: &str, n: u32) -> u32 {
    (crate::state::units::key_hash(id) % u64::from(n.max(1))) as u32
}

/// The group side of a service: set once co-partitioned topics are consumed.
#[derive(Debug)]
pub struct Group {
    n_partitions: u32,
    state: Mutex<GroupState>,
}

#[derive(Debug, Default)]
struct GroupState {
    /// Per experiment state key, the owner's (or a follower's) view of every partition.
    mergers: BTreeMap<String, Merger<ExperimentSnapshot>>,
    /// Latest heartbeat per partition: (position, watermark).
    heartbeats: BTreeMap<u32, (i64, Micros)>,
    /// Heartbeats this instance last sent per partition, to send only changes.
    sent: BTreeMap<u32, (i64, Micros)>,
    /// Latest acknowledged boundary per experiment.
    acknowledged: BTreeMap<String, Micros>,
    /// The latest acknowledgement per experiment: the boundary and the owner's part of the
    /// alert desk as of it (what a new owner takes over).
    books: BTreeMap<String, (Micros, Value)>,
    /// Experiments this instance evaluates as their owner (their alerts taken over).
    owned: std::collections::BTreeSet<String>,
}

/// What one instance knows about an experiment decided across the group.
#[derive(Debug, Clone, PartialEq)]
pub struct GroupView {
    /// Input partition whose holder owns the experiment.
    pub owner_partition: u32,
    /// Whether this instance holds that partition now.
    pub owned_here: bool,
    /// The last boundary evaluated (by the owner, as acknowledged on the topic).
    pub evaluated: Option<Micros>,
    /// The smallest reference-time watermark over the partitions (none until every partition
    /// has reported).
    pub watermark: Option<Micros>,
}

impl Group {
    fn new(n_partitions: u32) -> Group {
        Group {
            n_partitions: n_partitions.max(1),
            state: Mutex::new(GroupState::default()),
        }
    }
}

fn encode_totals(s: &ExperimentSnapshot) -> Value {
    let metrics: Vec<Value> = s
        .metrics
        .iter()
        .map(|m| match m {
            MetricTotals::Conversion(v) => {
                json!({"conversion": v.iter().map(|t| [t.trials, t.successes]).collect::<Vec<_>>()})
            }
            MetricTotals::Defect(v) => json!({
                "defect": v.iter().map(|t| [t.count, t.exposure.to_bits()]).collect::<Vec<_>>()
            }),
        })
        .collect();
    json!({
        "units": s.units,
        "metrics": metrics,
        "outcomes": s.outcomes.0,
        "first": s.first_event_time,
        "last": s.last_event_time,
    })
}

fn decode_totals(def: &Arc<ExperimentDef>, v: &Value) -> Option<ExperimentSnapshot> {
    let mut s = ExperimentState::new(Arc::clone(def)).snapshot();
    let pairs = |v: &Value| -> Option<Vec<(u64, u64)>> {
        v.as_array()?
            .iter()
            .map(|p| Some((p.get(0)?.as_u64()?, p.get(1)?.as_u64()?)))
            .collect()
    };
    let units: Vec<u64> = v["units"]
        .as_array()?
        .iter()
        .map(Value::as_u64)
        .collect::<Option<_>>()?;
    if units.len() != s.units.len() {
        return None;
    }
    s.units = units;
    let metrics = v["metrics"].as_array()?;
    if metrics.len() != s.metrics.len() {
        return None;
    }
    for (m, value) in s.metrics.iter_mut().zip(metrics) {
        match m {
            MetricTotals::Conversion(t) => {
                let p = pairs(&value["conversion"])?;
                if p.len() != t.len() {
                    return None;
                }
                *t = p
                    .into_iter()
                    .map(|(trials, successes)| ConversionTotals { trials, successes })
                    .collect();
            }
            MetricTotals::Defect(t) => {
                let p = pairs(&value["defect"])?;
                if p.len() != t.len() {
                    return None;
                }
                *t = p
                    .into_iter()
                    .map(|(count, bits)| DefectTotals {
                        count,
                        exposure: f64::from_bits(bits),
                    })
                    .collect();
            }
        }
    }
    let outcomes = v["outcomes"].as_array()?;
    let mut counts = OutcomeCounts::default();
    if outcomes.len() != counts.0.len() {
        return None;
    }
    for (c, o) in counts.0.iter_mut().zip(outcomes) {
        *c = o.as_u64()?;
    }
    s.outcomes = counts;
    s.first_event_time = v["first"].as_i64();
    s.last_event_time = v["last"].as_i64();
    Some(s)
}

/// A decoded message.
enum Parsed {
    Heartbeat {
        partition: u32,
        position: i64,
        watermark: Micros,
    },
    Partial {
        experiment: String,
        partition: u32,
        position: i64,
        watermark: Micros,
        as_of: Vec<(Micros, Value)>,
    },
    Ack {
        experiment: String,
        evaluated: Micros,
    },
}

fn parse(key: &str, value: &[u8]) -> Option<Parsed> {
    let v: Value = serde_json::from_slice(value).ok()?;
    if let Some(p) = key.strip_prefix("p/") {
        return Some(Parsed::Heartbeat {
            partition: p.parse().ok()?,
            position: v["position"].as_i64()?,
            watermark: v["watermark"].as_i64()?,
        });
    }
    if let Some(rest) = key.strip_prefix("e/") {
        let (experiment, partition) = rest.rsplit_once('/')?;
        let as_of = v["as_of"]
            .as_array()?
            .iter()
            .map(|e| Some((e.get(0)?.as_i64()?, e.get(1)?.clone())))
            .collect::<Option<Vec<_>>>()?;
        return Some(Parsed::Partial {
            experiment: experiment.to_string(),
            partition: partition.parse().ok()?,
            position: v["position"].as_i64()?,
            watermark: v["watermark"].as_i64()?,
            as_of,
        });
    }
    if let Some(experiment) = key.strip_prefix("a/") {
        return Some(Parsed::Ack {
            experiment: experiment.to_string(),
            evaluated: v["evaluated"].as_i64()?,
        });
    }
    None
}

impl Service {
    /// Decide the experiments of co-partitioned shards across the group: from now on those
    /// shards keep reference-time boundaries (every `evaluate_every_secs`) instead of making
    /// experiments due by event, and the owner of each experiment evaluates its boundaries on
    /// merged partials ([`Service::offer_group_message`]). `n_partitions` is the input topics'
    /// partition count. Called once, before anything is consumed.
    pub fn start_group(&self, n_partitions: u32) {
        if self.group.set(Group::new(n_partitions)).is_ok() {
            self.lock_shards().keep_boundaries(self.cadence.every);
        }
    }

    /// Whether experiments are decided across the group.
    pub fn group_started(&self) -> bool {
        self.group.get().is_some()
    }

    /// What this instance knows of experiment `id` decided across the group (`None` outside
    /// group mode or for an unknown experiment).
    pub fn group_view(&self, id: &str) -> Option<GroupView> {
        let group = self.group.get()?;
        let key = {
            let shards = self.lock_shards();
            shards.defs().iter().find(|d| d.id == id)?.state_key()
        };
        let owner_partition = owner_partition(id, group.n_partitions);
        let owned_here = self.holds_partition(owner_partition);
        let state = lock(&group.state);
        let merger = state.mergers.get(&key);
        Some(GroupView {
            owner_partition,
            owned_here,
            evaluated: state.acknowledged.get(&key).copied(),
            watermark: merger.and_then(Merger::low_watermark),
        })
    }

    fn holds_partition(&self, partition: u32) -> bool {
        self.lock_shards()
            .shard(ShardId::co_partitioned(partition as i32).as_str())
            .is_some()
    }

    /// The messages to publish now: the partials of every local co-partitioned shard whose
    /// entries changed, then each shard's heartbeat if its position or watermark moved.
    pub fn take_group_messages(&self) -> Vec<GroupMessage> {
        let Some(group) = self.group.get() else {
            return Vec::new();
        };
        let mut out = Vec::new();
        let mut beats = Vec::new();
        {
            let mut shards = self.lock_shards();
            for id in shards.ids() {
                if !id.is_co_partitioned() {
                    continue;
                }
                let Some(partition) = id.kafka_partition() else {
                    continue;
                };
                let Some(shard) = shards.shard_mut_if_present(id.as_str()) else {
                    continue;
                };
                let position = shard.next_offset().unwrap_or(0);
                let Some(b) = shard.boundaries_mut() else {
                    continue;
                };
                let Some(watermark) = b.watermark() else {
                    continue;
                };
                for experiment in b.take_changed() {
                    let as_of: Vec<Value> = b
                        .entries(&experiment)
                        .iter()
                        .map(|(at, s)| json!([at, encode_totals(s)]))
                        .collect();
                    out.push(GroupMessage {
                        key: format!("e/{experiment}/{partition}"),
                        value:
                            json!({"position": position, "watermark": watermark, "as_of": as_of})
                                .to_string()
                                .into_bytes(),
                    });
                }
                beats.push((partition as u32, position, watermark));
            }
        }
        let mut state = lock(&group.state);
        for (partition, position, watermark) in beats {
            if state.sent.get(&partition) == Some(&(position, watermark)) {
                continue;
            }
            state.sent.insert(partition, (position, watermark));
            out.push(GroupMessage {
                key: format!("p/{partition}"),
                value: json!({"position": position, "watermark": watermark})
                    .to_string()
                    .into_bytes(),
            });
        }
        out
    }

    /// A publication of [`Service::take_group_messages`] failed: take everything again next
    /// time (partials are cumulative, so sending one twice is harmless).
    pub fn requeue_group_messages(&self) {
        let Some(group) = self.group.get() else {
            return;
        };
        lock(&group.state).sent.clear();
        let mut shards = self.lock_shards();
        for id in shards.ids() {
            if let Some(b) = shards
                .shard_mut_if_present(id.as_str())
                .and_then(|s| s.boundaries_mut())
            {
                b.mark_all_changed();
            }
        }
    }

    /// Take one message read from the partials topic (in topic order; `None` value: a
    /// tombstone, ignored). Nothing is evaluated here: the follower evaluates on its sweep
    /// ([`Service::evaluate_group_ready`]) once it has read the topic to its end, since the
    /// acknowledgements behind that end may cover the boundaries, and the alerts it would take
    /// over would be old.
    pub fn offer_group_message(&self, key: &[u8], value: Option<&[u8]>) {
        let Some(group) = self.group.get() else {
            return;
        };
        let (Ok(key), Some(value)) = (std::str::from_utf8(key), value) else {
            return;
        };
        let Some(parsed) = parse(key, value) else {
            tracing::warn!(key, "skipping an unreadable message on the partials topic");
            return;
        };
        match parsed {
            Parsed::Heartbeat {
                partition,
                position,
                watermark,
            } => {
                self.metrics
                    .group_watermark
                    .with_label_values(&[&partition.to_string()])
                    .set(watermark as f64 / 1e6);
                let mut state = lock(&group.state);
                state.heartbeats.insert(partition, (position, watermark));
                for merger in state.mergers.values_mut() {
                    merger.offer(Partial {
                        partition,
                        positions: vec![position],
                        watermark,
                        as_of: Vec::new(),
                    });
                }
            }
            Parsed::Partial {
                experiment,
                partition,
                position,
                watermark,
                as_of,
            } => {
                let Some(def) = self
                    .lock_shards()
                    .defs()
                    .iter()
                    .find(|d| d.state_key() == experiment)
                    .cloned()
                else {
                    return;
                };
                let as_of: Option<Vec<(Micros, ExperimentSnapshot)>> = as_of
                    .iter()
                    .map(|(b, v)| Some((*b, decode_totals(&def, v)?)))
                    .collect();
                let Some(as_of) = as_of else {
                    tracing::warn!(
                        key,
                        "skipping a partial whose totals do not fit the experiment's definition"
                    );
                    return;
                };
                let offered = {
                    let mut state = lock(&group.state);
                    let state = &mut *state;
                    let merger = state.mergers.entry(experiment.clone()).or_insert_with(|| {
                        let mut m = Merger::new(
                            group.n_partitions,
                            ExperimentState::new(Arc::clone(&def)).snapshot(),
                        );
                        // Partitions that never counted this experiment are known by their
                        // heartbeats alone.
                        for (&p, &(position, watermark)) in &state.heartbeats {
                            m.offer(Partial {
                                partition: p,
                                positions: vec![position],
                                watermark,
                                as_of: Vec::new(),
                            });
                        }
                        if let Some(&b) = state.acknowledged.get(&experiment) {
                            m.evaluated(b);
                        }
                        m
                    });
                    merger.offer(Partial {
                        partition,
                        positions: vec![position],
                        watermark,
                        as_of,
                    })
                };
                let result = match offered {
                    Offered::Taken => "taken",
                    Offered::Stale => "stale",
                    Offered::Revised => "revised",
                    Offered::Conflict => "conflict",
                };
                self.metrics
                    .group_partials
                    .with_label_values(&[result])
                    .inc();
                if offered == Offered::Revised {
                    tracing::warn!(key, "a partition's new holder placed records at other boundaries than its old holder (idle declarations or records behind the watermark); boundaries not yet evaluated take the new totals");
                }
                if offered == Offered::Conflict {
                    tracing::error!(key, "a partial conflicts with the one held (two writers for one partition?); ignored");
                }
            }
            Parsed::Ack {
                experiment,
                evaluated,
            } => {
                let v: Value = serde_json::from_slice(value).unwrap_or_default();
                let id = id_of(&experiment).to_string();
                let adopt = {
                    let mut state = lock(&group.state);
                    let e = state
                        .acknowledged
                        .entry(experiment.clone())
                        .or_insert(evaluated);
                    *e = (*e).max(evaluated);
                    if let Some(m) = state.mergers.get_mut(&experiment) {
                        m.evaluated(evaluated);
                    }
                    let newer = state
                        .books
                        .get(&experiment)
                        .is_none_or(|(b, _)| evaluated >= *b);
                    if newer {
                        state
                            .books
                            .insert(experiment.clone(), (evaluated, v["book"].clone()));
                    }
                    // Another instance evaluates it now: show its alerts here too.
                    let ours = state.owned.contains(&experiment)
                        && self.holds_partition(owner_partition(&id, group.n_partitions));
                    if !ours {
                        state.owned.remove(&experiment);
                    }
                    (newer && !ours).then(|| v["book"].clone())
                };
                if let Some(book) = adopt {
                    if !book.is_null() {
                        lock(&self.desk).adopt_experiment(&id, &experiment, &book, false);
                    }
                }
                let mut shards = self.lock_shards();
                for id in shards.ids() {
                    if !id.is_co_partitioned() {
                        continue;
                    }
                    if let Some(b) = shards
                        .shard_mut_if_present(id.as_str())
                        .and_then(|s| s.boundaries_mut())
                    {
                        b.acknowledge(&experiment, evaluated);
                    }
                }
            }
        }
    }

    /// Evaluate what is ready of every experiment this instance owns now, and return the
    /// acknowledgements to publish. The follower calls this on its sweep, once it has read the
    /// topic to its end; an instance that gains a partition by a rebalance owns its
    /// experiments from then on without any message saying so.
    pub fn evaluate_group_ready(&self) -> Vec<GroupMessage> {
        let Some(group) = self.group.get() else {
            return Vec::new();
        };
        // The partitions held here, read once per sweep rather than once per experiment.
        let held: std::collections::BTreeSet<u32> = {
            let shards = self.lock_shards();
            shards
                .ids()
                .iter()
                .filter(|id| id.is_co_partitioned())
                .filter_map(|id| id.kafka_partition())
                .map(|p| p as u32)
                .collect()
        };
        let experiments: Vec<String> = lock(&group.state).mergers.keys().cloned().collect();
        experiments
            .iter()
            .filter(|e| held.contains(&owner_partition(id_of(e), group.n_partitions)))
            .flat_map(|e| self.evaluate_ready(group, e))
            .collect()
    }

    /// Evaluate every boundary of `experiment` (a state key, owned here) now ready on the
    /// merged totals, in order, on this thread (the acknowledgement must follow the
    /// evaluation), and return the acknowledgement of the last one with the experiment's part
    /// of the alert desk. An instance that just became the owner first takes over the alerts
    /// and pending deliveries of the last acknowledgement.
    fn evaluate_ready(&self, group: &Group, experiment: &str) -> Vec<GroupMessage> {
        let id = id_of(experiment);
        let (due, takeover) = {
            let mut state = lock(&group.state);
            let takeover = if state.owned.insert(experiment.to_string()) {
                Some(state.books.get(experiment).map(|(_, book)| book.clone()))
            } else {
                None
            };
            let Some(merger) = state.mergers.get_mut(experiment) else {
                return Vec::new();
            };
            let ready = merger.ready();
            let due: Vec<(Micros, ExperimentSnapshot)> =
                ready.iter().map(|&b| (b, merger.totals_at(b))).collect();
            if let Some(&last) = ready.last() {
                merger.evaluated(last);
            }
            (due, takeover)
        };
        if let Some(book) = takeover {
            tracing::info!(
                experiment = id,
                "this instance owns the experiment now: evaluating it, and sending its alerts"
            );
            if let Some(book) = book.filter(|b| !b.is_null()) {
                lock(&self.desk).adopt_experiment(id, experiment, &book, true);
            }
        }
        let Some(&(last, _)) = due.last() else {
            return Vec::new();
        };
        self.metrics
            .group_boundaries
            .with_label_values(&[id])
            .inc_by(due.len() as u64);
        for (_, snapshot) in due {
            if snapshot.is_empty() {
                continue;
            }
            self.metrics
                .evaluations
                .with_label_values(&["queued"])
                .inc();
            self.evaluate_due(snapshot);
        }
        self.refresh_alert_gauges();
        let book = lock(&self.desk).experiment_json(id, experiment);
        vec![GroupMessage {
            key: format!("a/{experiment}"),
            value: json!({ "evaluated": last, "book": book })
                .to_string()
                .into_bytes(),
        }]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn totals_round_trip_bit_for_bit() {
        let def = Arc::new(crate::service::test_checkout_copy());
        let mut s = ExperimentState::new(Arc::clone(&def)).snapshot();
        s.units = vec![3, 4];
        for m in &mut s.metrics {
            match m {
                MetricTotals::Conversion(t) => {
                    t[1] = ConversionTotals {
                        trials: 9,
                        successes: 2,
                    }
                }
                MetricTotals::Defect(t) => {
                    t[0] = DefectTotals {
                        count: 5,
                        exposure: 0.1 + 0.2,
                    }
                }
            }
        }
        s.outcomes.0[0] = 7;
        s.last_event_time = Some(1_700_000_000_123_456);
        let back = decode_totals(&def, &encode_totals(&s)).unwrap();
        assert_eq!(back, s);
    }

    #[test]
    fn owner_partition_is_stable_and_in_range() {
        for n in 1..8 {
            assert!(owner_partition("crumb-checkout-copy", n) < n);
        }
        assert_eq!(
            owner_partition("crumb-checkout-copy", 6),
            owner_partition("crumb-checkout-copy", 6)
        );
    }
}
