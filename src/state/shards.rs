//! State split by input shard: one [`Engine`] per Kafka partition (plus one each for HTTP and
//! the simulator), so a partition's state can be stored with that partition's offset and
//! handed over on its own when the partition moves.
//!
//! Producers key events by experiment id, so each experiment lives in one partition and the
//! shards of an experiment do not overlap; readers merge an experiment across shards.

use std::collections::BTreeMap;
use std::sync::Arc;

use super::image::{ExperimentImage, ImageMismatch};
use super::members::exposure_secs;
use super::partials::ShardBoundaries;
use super::{Engine, ExperimentSnapshot, ExperimentState};
use crate::event::{Event, Micros, Outcome, Reject};
use crate::experiment::ExperimentDef;

/// Names one input shard: a Kafka partition, the events posted over HTTP, or the simulator.
/// Its text form (`kafka/<topic>/<partition>`, `http`, `simulator`) names the shard's file and
/// its changelog keys, so it is stable; the kind of a shard is asked here, never read off the
/// text elsewhere.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct ShardId(String);

/// The text form of the shard of events posted over HTTP (also its write-ahead log's name).
pub const HTTP_SHARD: &str = "http";

const KAFKA_PREFIX: &str = "kafka/";

/// The name standing for the topic in the shards of co-partitioned topics: `+` cannot occur
/// in a Kafka topic name, so it never clashes with a topic's own shard.
const CO_PARTITIONED: &str = "+units";

impl ShardId {
    /// The shard of partition `partition` of every co-partitioned (unit-keyed) input topic.
    pub fn co_partitioned(partition: i32) -> ShardId {
        ShardId(format!("{KAFKA_PREFIX}{CO_PARTITIONED}/{partition}"))
    }

    /// Whether this shard covers one partition index of the co-partitioned topics.
    pub fn is_co_partitioned(&self) -> bool {
        self.0.strip_prefix(KAFKA_PREFIX).is_some_and(|rest| {
            rest.starts_with(CO_PARTITIONED) && rest[CO_PARTITIONED.len()..].starts_with('/')
        })
    }

    /// The shard of Kafka partition `partition` of `topic`.
    pub fn kafka(topic: &str, partition: i32) -> ShardId {
        ShardId(format!("{KAFKA_PREFIX}{topic}/{partition}"))
    }

    /// The shard of events posted over HTTP.
    pub fn http() -> ShardId {
        ShardId(HTTP_SHARD.to_string())
    }

    /// Whether this is a Kafka partition's shard.
    pub fn is_kafka(&self) -> bool {
        self.0.starts_with(KAFKA_PREFIX)
    }

    /// Whether this is the shard of events posted over HTTP.
    pub fn is_http(&self) -> bool {
        self.0 == HTTP_SHARD
    }

    /// The input partition of a Kafka partition's shard.
    pub fn kafka_partition(&self) -> Option<i32> {
        let rest = self.0.strip_prefix(KAFKA_PREFIX)?;
        rest.rsplit('/').next()?.parse().ok()
    }

    /// The text form.
    pub fn as_str(&self) -> &str {
        &self.0
    }
}

/// A shard named by its text form (as sources hand events over, and as files and changelog
/// keys store it).
impl From<&str> for ShardId {
    fn from(name: &str) -> ShardId {
        ShardId(name.to_string())
    }
}

/// Read as its text form wherever a name is enough (maps, files, keys, log fields).
impl std::ops::Deref for ShardId {
    type Target = str;
    fn deref(&self) -> &str {
        &self.0
    }
}

impl std::borrow::Borrow<str> for ShardId {
    fn borrow(&self) -> &str {
        &self.0
    }
}

impl std::fmt::Display for ShardId {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

/// One shard's state and the input position it reflects. The position and the state change
/// together ([`Shard::advance`] before an event is applied), and the dirty mark follows every
/// change, so a stored image always pairs a state with the position it reflects.
#[derive(Debug)]
pub struct Shard {
    /// The shard's experiments.
    engine: Engine,
    /// Next input offset to apply (Kafka shards); everything before it is in `engine`. For a
    /// co-partitioned shard, the sum of `streams`' offsets: it only grows, so it orders two
    /// images of the shard as a single topic's offset does.
    next_offset: Option<i64>,
    /// Whether anything changed since the shard was last stored.
    dirty: bool,
    /// Co-partitioned shards: the next offset of each input topic covered.
    streams: BTreeMap<String, i64>,
    /// Co-partitioned shards: the latest event time read on the assignment topics.
    watermark: Option<Micros>,
    /// Co-partitioned shards: the latest time of an outcome read on the other topics.
    outcome_mark: Option<Micros>,
    /// Outcomes read before the assignments reached their time, by (time, arrival).
    held: BTreeMap<(Micros, u64), Event<'static>>,
    /// Arrival counter of `held`.
    held_seq: u64,
    /// Co-partitioned shards whose experiments are decided across instances: the totals as
    /// of each reference-time boundary (docs/scaling-design.md).
    boundaries: Option<ShardBoundaries>,
    /// The boundary mark of the image this shard was restored from, until boundaries are kept.
    restored_mark: Option<Micros>,
    /// Co-partitioned shards: the reference-time watermark (see
    /// [`Shard::note_reference_watermark`]). Not stored: the consumer derives it again after a
    /// restart from the records and its topics' ends.
    reference_mark: Option<Micros>,
}

/// Why a held outcome is decided now.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Release {
    /// The assignment stream's watermark passed the outcome's second.
    Watermark,
    /// The other streams moved on by more than the lateness bound while the assignments did
    /// not reach the outcome: it is decided on the exposures known now.
    Lateness,
}

impl Shard {
    /// An empty shard.
    pub fn new(defs: &[Arc<ExperimentDef>]) -> Shard {
        Shard {
            engine: Engine::with_defs(defs.iter().cloned()),
            next_offset: None,
            dirty: false,
            streams: BTreeMap::new(),
            watermark: None,
            outcome_mark: None,
            held: BTreeMap::new(),
            held_seq: 0,
            boundaries: None,
            restored_mark: None,
            reference_mark: None,
        }
    }

    /// The time (a record's reference time: its Kafka timestamp) below which every record of
    /// every input topic of this shard has been applied, as the consumer last reported it;
    /// `None` before the first report. Never moves back.
    pub fn reference_watermark(&self) -> Option<Micros> {
        self.reference_mark
    }

    /// The consumer has applied every record of this shard's topics with a reference time
    /// below `t`; an earlier `t` than the one noted is ignored, so the mark never moves back.
    pub fn note_reference_watermark(&mut self, t: Micros) {
        if self.reference_mark.is_none_or(|m| t > m) {
            self.reference_mark = Some(t);
            // Every record before `t` is applied: the boundaries up to it are closed (an
            // idle shard's boundaries pass this way, with no record to pass them).
            self.pass_reference(t);
        }
    }

    /// Keep totals as of reference-time boundaries every `every` µs from now on (a
    /// co-partitioned shard of an instance in a group; nothing if already kept).
    pub fn keep_boundaries(&mut self, every: Micros) {
        if self.boundaries.is_none() {
            let mut b = ShardBoundaries::new(every);
            b.restore(self.restored_mark.take(), Vec::new());
            self.boundaries = Some(b);
        }
    }

    /// The boundary log, if this shard keeps one.
    pub fn boundaries(&self) -> Option<&ShardBoundaries> {
        self.boundaries.as_ref()
    }

    /// The boundary log, mutably (to acknowledge or take what changed).
    pub fn boundaries_mut(&mut self) -> Option<&mut ShardBoundaries> {
        self.boundaries.as_mut()
    }

    /// A record with reference time `t` is about to be applied (or the shard is idle up to
    /// `t`): record the totals as of the boundaries passed. Returns whether any was passed.
    #[inline]
    pub fn pass_reference(&mut self, t: Micros) -> bool {
        let Some(b) = self.boundaries.as_mut() else {
            return false;
        };
        if !b.passes(t) {
            // Moves the watermark only (no totals needed).
            return b.advance(t, std::iter::empty);
        }
        let engine = &self.engine;
        b.advance(t, || engine.experiments().map(|e| e.snapshot()))
    }

    /// Move the position of input topic `topic` past `offset` (co-partitioned shards, which
    /// cover several topics): `false` (and no change) when the shard already holds it.
    #[inline]
    pub fn advance_stream(&mut self, topic: &str, offset: i64) -> bool {
        let next = match self.streams.get_mut(topic) {
            Some(next) if offset < *next => return false,
            Some(next) => {
                let was = *next;
                *next = offset + 1;
                offset + 1 - was
            }
            None => {
                self.streams.insert(topic.to_string(), offset + 1);
                offset + 1
            }
        };
        self.next_offset = Some(self.next_offset.unwrap_or(0) + next);
        self.dirty = true;
        true
    }

    /// Next offset of input topic `topic` in a co-partitioned shard.
    pub fn stream_offset(&self, topic: &str) -> Option<i64> {
        self.streams.get(topic).copied()
    }

    /// The latest event time read on the assignment topics (co-partitioned shards).
    pub fn watermark(&self) -> Option<Micros> {
        self.watermark
    }

    /// An event at `time` was read on an assignment topic.
    pub fn note_assignment_time(&mut self, time: Micros) {
        if self.watermark.is_none_or(|w| time > w) {
            self.watermark = Some(time);
            self.dirty = true;
        }
    }

    /// Whether an outcome at `time` must wait: the assignments have not yet passed its
    /// second (exposures count from their whole second, so all of that second must be read).
    pub fn must_hold(&self, time: Micros) -> bool {
        self.watermark
            .is_none_or(|w| exposure_secs(w) <= exposure_secs(time))
    }

    /// Keep `event` (an outcome naming no experiment, with a time) until it can be decided.
    pub fn hold(&mut self, event: Event<'static>) {
        let time = event.time.unwrap_or(0);
        self.held.insert((time, self.held_seq), event);
        self.held_seq += 1;
        self.dirty = true;
    }

    /// An outcome at `time` was read on a topic other than the assignments'.
    pub fn note_outcome_time(&mut self, time: Micros) {
        if self.outcome_mark.is_none_or(|m| time > m) {
            self.outcome_mark = Some(time);
            self.dirty = true;
        }
    }

    /// Number of outcomes held.
    pub fn n_held(&self) -> usize {
        self.held.len()
    }

    /// Take out, earliest first, the held outcomes that can be decided now: those whose second
    /// the watermark passed, and those more than `lateness` older than the latest outcome read.
    pub fn take_releasable(&mut self, lateness: Micros) -> Vec<(Event<'static>, Release)> {
        let mut out = Vec::new();
        while let Some((&(time, _), _)) = self.held.first_key_value() {
            let why = if !self.must_hold(time) {
                Release::Watermark
            } else if self
                .outcome_mark
                .is_some_and(|m| m.saturating_sub(time) > lateness)
            {
                Release::Lateness
            } else {
                break;
            };
            let (_, event) = self.held.pop_first().expect("peeked above");
            out.push((event, why));
        }
        if !out.is_empty() {
            self.dirty = true;
        }
        out
    }

    /// The shard's experiments.
    pub fn engine(&self) -> &Engine {
        &self.engine
    }

    /// Next input offset to apply; everything before it is in the state.
    pub fn next_offset(&self) -> Option<i64> {
        self.next_offset
    }

    /// Move the position past input `offset`, which is about to be applied: `false` (and no
    /// change) when the shard already holds it, as after a redelivery.
    #[inline]
    pub fn advance(&mut self, offset: i64) -> bool {
        if self.next_offset.is_some_and(|next| offset < next) {
            return false;
        }
        self.next_offset = Some(offset + 1);
        self.dirty = true;
        true
    }

    /// The image to store if anything changed since the last one, clearing the mark (see
    /// [`Shard::mark_unsaved`] for a write that then failed).
    pub fn take_unsaved(&mut self) -> Option<ShardImage> {
        if !self.dirty {
            return None;
        }
        self.dirty = false;
        Some(self.image())
    }

    /// A write of the image from [`Shard::take_unsaved`] failed: store the shard again.
    pub fn mark_unsaved(&mut self) {
        self.dirty = true;
    }

    /// See [`crate::state::Engine::prepare`].
    #[inline]
    pub fn prepare(&self, event: &Event<'_>) -> Option<crate::state::Prepared> {
        self.engine.prepare(event)
    }

    /// Apply one event and mark the shard dirty if it changed anything countable.
    pub fn apply(&mut self, event: &Event<'_>) -> Result<Outcome, Reject> {
        self.apply_prepared(event, None)
    }

    /// [`Shard::apply`] with `prepared` from [`Shard::prepare`] of this event, if any.
    pub fn apply_prepared(
        &mut self,
        event: &Event<'_>,
        prepared: Option<crate::state::Prepared>,
    ) -> Result<Outcome, Reject> {
        let r = self.engine.apply_prepared(event, prepared);
        if r.is_ok() {
            self.dirty = true;
        }
        r
    }

    /// [`Shard::apply`], also pushing the snapshot of each experiment the event makes due
    /// under `cadence` (see [`Engine::apply_due`]).
    pub fn apply_due(
        &mut self,
        event: &Event<'_>,
        prepared: Option<crate::state::Prepared>,
        cadence: &super::cadence::Cadence,
        due: &mut Vec<ExperimentSnapshot>,
    ) -> Result<Outcome, Reject> {
        let r = self.engine.apply_due(event, prepared, cadence, due);
        if r.is_ok() {
            self.dirty = true;
        }
        r
    }
}

/// The complete state of one shard as plain data, for the store.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct ShardImage {
    /// Next input offset to apply.
    pub next_offset: Option<i64>,
    /// Every experiment that saw a valid event in this shard.
    pub experiments: Vec<ExperimentImage>,
    /// Co-partitioned shards: each covered topic with its next offset.
    pub streams: Vec<(String, i64)>,
    /// Co-partitioned shards: latest event time read on the assignment topics.
    pub watermark: Option<Micros>,
    /// Co-partitioned shards: latest outcome time read on the other topics.
    pub outcome_mark: Option<Micros>,
    /// Outcomes held for the assignments to catch up, earliest first.
    pub held: Vec<Event<'static>>,
    /// Co-partitioned shards keeping boundaries: the reference-time watermark, so a restored
    /// shard records the same boundaries its records pass as the shard before it did.
    pub boundary_mark: Option<Micros>,
}

impl Shard {
    /// The shard as an image (experiments without events are left out).
    pub fn image(&self) -> ShardImage {
        let mut exposures = self.engine.exposures_by_experiment();
        ShardImage {
            next_offset: self.next_offset,
            experiments: self
                .engine
                .experiments()
                .enumerate()
                .filter(|(_, e)| !e.snapshot().is_empty())
                .map(|(x, e)| {
                    let mut image = e.image();
                    image.exposures = Some(std::mem::take(&mut exposures[x]));
                    image
                })
                .collect(),
            streams: self.streams.iter().map(|(t, o)| (t.clone(), *o)).collect(),
            watermark: self.watermark,
            outcome_mark: self.outcome_mark,
            held: self.held.values().cloned().collect(),
            boundary_mark: self
                .boundaries
                .as_ref()
                .and_then(ShardBoundaries::watermark)
                .or(self.restored_mark),
        }
    }

    /// Rebuild a shard from `image` over `defs`. Experiments whose stored shape no longer
    /// fits their definition, or that are no longer configured, are left empty and reported.
    pub fn from_image(
        defs: &[Arc<ExperimentDef>],
        image: ShardImage,
    ) -> (Shard, Vec<ImageMismatch>) {
        let mut shard = Shard::new(defs);
        shard.next_offset = image.next_offset;
        shard.streams = image.streams.into_iter().collect();
        shard.watermark = image.watermark;
        shard.outcome_mark = image.outcome_mark;
        shard.restored_mark = image.boundary_mark;
        for event in image.held {
            shard.hold(event);
        }
        shard.dirty = false;
        let mut mismatches = Vec::new();
        let memberships = image
            .experiments
            .iter()
            .map(|e| e.exposures.as_ref().map_or(e.units.len(), Vec::len))
            .sum();
        shard.engine.reserve_memberships(memberships);
        for mut e in image.experiments {
            let exposures = e.exposures.take();
            let Some(def) = defs.iter().find(|d| d.state_key() == e.id) else {
                let base = e.id.split('~').next().unwrap_or_default();
                let reason = if defs.iter().any(|d| d.id == base) {
                    "it belongs to an earlier generation of the experiment (restarted or re-created over the API; its totals are in the archive)"
                } else {
                    "the experiment is no longer configured"
                };
                mismatches.push(ImageMismatch {
                    id: e.id.clone(),
                    reason: reason.into(),
                });
                continue;
            };
            match ExperimentState::from_image(Arc::clone(def), e) {
                Ok(state) => shard.engine.replace(state, exposures),
                Err(m) => mismatches.push(m),
            }
        }
        (shard, mismatches)
    }
}

/// All shards of this process.
#[derive(Debug)]
pub struct Shards {
    defs: Vec<Arc<ExperimentDef>>,
    shards: BTreeMap<ShardId, Shard>,
    /// Totals of shards owned by other instances, as last published in the changelog; used
    /// only for reading, and only for shard ids not held here.
    remote: BTreeMap<ShardId, (Option<i64>, Vec<ExperimentSnapshot>)>,
    /// How far (event time) the other co-partitioned topics may run ahead of the assignments
    /// before an outcome held for them is decided anyway.
    lateness: Micros,
    /// Boundary spacing for co-partitioned shards when experiments are decided across
    /// instances (`None`: each shard's experiments are evaluated by event, as before).
    boundary_every: Option<Micros>,
}

/// Default of [`Shards::lateness`]: five minutes (see docs/events.md).
pub const DEFAULT_LATENESS: Micros = 300 * 1_000_000;

impl Shards {
    /// No shards yet, over `defs`.
    pub fn new(defs: impl IntoIterator<Item = ExperimentDef>) -> Shards {
        Shards {
            defs: defs.into_iter().map(Arc::new).collect(),
            shards: BTreeMap::new(),
            remote: BTreeMap::new(),
            lateness: DEFAULT_LATENESS,
            boundary_every: None,
        }
    }

    /// Keep reference-time boundaries every `every` µs in every co-partitioned shard (present
    /// and future): their experiments are decided by one owner on merged totals.
    pub fn keep_boundaries(&mut self, every: Micros) {
        self.boundary_every = Some(every);
        for (id, shard) in &mut self.shards {
            if id.is_co_partitioned() {
                shard.keep_boundaries(every);
            }
        }
    }

    /// The boundary spacing, when co-partitioned shards keep boundaries.
    pub fn boundary_every(&self) -> Option<Micros> {
        self.boundary_every
    }

    /// The bound on holding outcomes for the assignments (see [`Shard::take_releasable`]).
    pub fn lateness(&self) -> Micros {
        self.lateness
    }

    /// Set [`Shards::lateness`].
    pub fn set_lateness(&mut self, lateness: Micros) {
        self.lateness = lateness;
    }

    /// The experiment definitions.
    pub fn defs(&self) -> &[Arc<ExperimentDef>] {
        &self.defs
    }

    /// The shard `id`, created empty if absent.
    pub fn shard_mut(&mut self, id: &str) -> &mut Shard {
        if !self.shards.contains_key(id) {
            let id = ShardId::from(id);
            let mut shard = Shard::new(&self.defs);
            if let (Some(every), true) = (self.boundary_every, id.is_co_partitioned()) {
                shard.keep_boundaries(every);
            }
            self.shards.insert(id, shard);
        }
        self.shards.get_mut(id).expect("inserted above")
    }

    /// The shard `id` to change, if present (never creates one).
    pub fn shard_mut_if_present(&mut self, id: &str) -> Option<&mut Shard> {
        self.shards.get_mut(id)
    }

    /// The shard `id`, if present.
    pub fn shard(&self, id: &str) -> Option<&Shard> {
        self.shards.get(id)
    }

    /// Put a (restored) shard in place. It was built from the definitions of a moment ago,
    /// outside the lock; experiments defined or removed since are brought in line here, so
    /// its events are never refused for an experiment that exists now.
    pub fn insert(&mut self, id: ShardId, mut shard: Shard) {
        let stale: Vec<String> = shard
            .engine
            .experiments()
            .map(|e| e.def().id.clone())
            .filter(|id| !self.defs.iter().any(|d| d.id == *id))
            .collect();
        for gone in stale {
            shard.engine.remove(&gone);
        }
        for def in &self.defs {
            let current = shard
                .engine
                .experiment(&def.id)
                .is_some_and(|e| Arc::ptr_eq(e.def(), def));
            if !current {
                shard.engine.define(Arc::clone(def));
            }
        }
        if let (Some(every), true) = (self.boundary_every, id.is_co_partitioned()) {
            shard.keep_boundaries(every);
        }
        self.shards.insert(id, shard);
    }

    /// Take a shard out (its partition was revoked).
    pub fn remove(&mut self, id: &str) -> Option<Shard> {
        self.shards.remove(id)
    }

    /// Ids of all shards present.
    pub fn ids(&self) -> Vec<ShardId> {
        self.shards.keys().cloned().collect()
    }

    /// Watch `def` in every shard, or redefine the experiment of that id (see
    /// [`Engine::define`]); returns the shards where state could not carry over, with why.
    pub fn define(&mut self, def: ExperimentDef) -> Vec<(ShardId, ImageMismatch)> {
        let def = Arc::new(def);
        match self.defs.iter_mut().find(|d| d.id == def.id) {
            Some(d) => *d = Arc::clone(&def),
            None => self.defs.push(Arc::clone(&def)),
        }
        let mut refused = Vec::new();
        for (id, shard) in &mut self.shards {
            if let Some(m) = shard.engine.define(Arc::clone(&def)) {
                refused.push((id.clone(), m));
            }
            shard.dirty = true;
        }
        // Remote totals were taken under the old shape; the follower refreshes them.
        for (_, snaps) in self.remote.values_mut() {
            snaps.retain(|s| s.def.id != def.id);
        }
        refused
    }

    /// Stop watching experiment `id` in every shard; `false` if it was not watched.
    pub fn undefine(&mut self, id: &str) -> bool {
        let before = self.defs.len();
        self.defs.retain(|d| d.id != id);
        for shard in self.shards.values_mut() {
            if shard.engine.remove(id).is_some() {
                shard.dirty = true;
            }
        }
        for (_, snaps) in self.remote.values_mut() {
            snaps.retain(|s| s.def.id != id);
        }
        self.defs.len() != before
    }

    /// Whether experiment `id` is configured.
    pub fn has_experiment(&self, id: &str) -> bool {
        self.defs.iter().any(|d| d.id == id)
    }

    /// Record the totals of shard `id` as another instance last published them.
    pub fn set_remote(&mut self, id: ShardId, image: &ShardImage) {
        let snaps = image
            .experiments
            .iter()
            .filter_map(|e| {
                let def = self.defs.iter().find(|d| d.state_key() == e.id)?;
                e.totals_snapshot(def)
            })
            .collect();
        self.remote.insert(id, (image.next_offset, snaps));
    }

    /// Experiment `id` merged across all shards (local ones, then remote ones not held here);
    /// `None` if it is not configured.
    pub fn snapshot(&self, id: &str) -> Option<ExperimentSnapshot> {
        self.defs
            .iter()
            .find(|d| d.id == id)
            .map(|def| self.snapshot_of(def))
    }

    /// Every experiment merged across shards, in configuration order (one pass over the
    /// definitions: each is looked up in the shards by hash, not searched for again).
    pub fn snapshots(&self) -> Vec<ExperimentSnapshot> {
        self.defs.iter().map(|d| self.snapshot_of(d)).collect()
    }

    fn snapshot_of(&self, def: &Arc<ExperimentDef>) -> ExperimentSnapshot {
        let mut merged = super::ExperimentState::new(Arc::clone(def)).snapshot();
        self.merge_shards(None, &mut merged);
        merged
    }

    /// Complete `snap`, experiment `snap.def.id` as shard `from` holds it, with the other
    /// shards' totals (local, then remote ones not held here) and the input positions, as
    /// [`Shards::snapshot`] would merge them. Costs one lookup per shard, not per experiment.
    pub fn merge_others(&self, from: &str, snap: &mut ExperimentSnapshot) {
        self.merge_shards(Some(from), snap);
    }

    /// Add to `snap` the totals of experiment `snap.def.id` in every shard but `held` (whose
    /// totals `snap` already has), local shards first, then remote ones not held here; and set
    /// the input positions the result reflects.
    fn merge_shards(&self, held: Option<&str>, snap: &mut ExperimentSnapshot) {
        let def = Arc::clone(&snap.def);
        let id = def.id.as_str();
        let mut positions = Vec::new();
        for (shard_id, shard) in &self.shards {
            if Some(shard_id.as_str()) == held {
                if let Some(next) = shard.next_offset {
                    positions.push((shard_id.to_string(), next));
                }
                continue;
            }
            if let Some(e) = shard.engine.experiment(id) {
                let other = e.snapshot();
                if !other.is_empty() {
                    snap.merge(&other);
                    if let Some(next) = shard.next_offset {
                        positions.push((shard_id.to_string(), next));
                    }
                }
            }
        }
        for (shard_id, (next, snaps)) in &self.remote {
            if self.shards.contains_key(shard_id) {
                continue;
            }
            for other in snaps.iter().filter(|s| s.def.id == id) {
                snap.merge(other);
                if let Some(next) = next {
                    positions.push((shard_id.to_string(), *next));
                }
            }
        }
        snap.positions = positions;
    }
}

#[cfg(test)]
mod reference_watermark_tests {
    use super::*;

    #[test]
    fn the_reference_watermark_only_moves_forward_and_is_not_stored() {
        let mut shard = Shard::new(&[]);
        assert_eq!(shard.reference_watermark(), None);
        shard.note_reference_watermark(5_000_000);
        shard.note_reference_watermark(3_000_000);
        assert_eq!(shard.reference_watermark(), Some(5_000_000));
        shard.note_reference_watermark(7_000_000);
        assert_eq!(shard.reference_watermark(), Some(7_000_000));
        // Derived again by the consumer after a restore, never part of the image.
        let (restored, _) = Shard::from_image(&[], shard.image());
        assert_eq!(restored.reference_watermark(), None);
        assert!(
            shard.take_unsaved().is_none(),
            "noting a watermark is no change to save"
        );
    }
}
