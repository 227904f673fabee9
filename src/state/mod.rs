//! Sufficient statistics per experiment, metric and variant, and the exact event semantics that
//! update them (first exposure, first conversion, duplicates, crossovers, orphans, id dedup).
//!
//! Pure and synchronous: sources decode events and call [`Engine::apply`]; readers take an
//! [`ExperimentSnapshot`], which copies the small per-variant totals and never the unit table.

pub mod cadence;
pub mod image;
pub mod members;
pub mod partials;
pub mod shards;
pub mod skew;
pub mod units;

use std::collections::HashMap;
use std::sync::Arc;

use crate::event::{Event, EventBody, Micros, Outcome, Reject, RejectReason, TallyAmounts, Target};
use crate::experiment::{ExperimentDef, ExposureBasis, MetricKind};
use units::{key_hash, IdSet, PassThrough, UnitSlot, UnitTable};

/// Totals of a conversion metric on one variant.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct ConversionTotals {
    /// Exposed units plus tallied trials.
    pub trials: u64,
    /// First conversions plus tallied successes; never exceeds `trials`.
    pub successes: u64,
}

/// Totals of a defect-rate metric on one variant.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct DefectTotals {
    /// Defects counted.
    pub count: u64,
    /// Exposure they were counted over.
    pub exposure: f64,
}

/// Per-variant totals of one metric.
#[derive(Debug, Clone, PartialEq)]
pub enum MetricTotals {
    /// Conversion metric, one entry per variant.
    Conversion(Vec<ConversionTotals>),
    /// Defect-rate metric, one entry per variant.
    Defect(Vec<DefectTotals>),
}

/// How many events ended in each per-experiment [`Outcome`], indexed like
/// `Outcome::PER_EXPERIMENT`.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct OutcomeCounts(pub [u64; Outcome::PER_EXPERIMENT.len()]);

impl OutcomeCounts {
    /// Count of one outcome (0 for outcomes that belong to no experiment).
    pub fn get(&self, outcome: Outcome) -> u64 {
        outcome_index(outcome).map_or(0, |i| self.0[i])
    }

    fn bump(&mut self, outcome: Outcome) {
        if let Some(i) = outcome_index(outcome) {
            self.0[i] += 1;
        }
    }
}

fn outcome_index(outcome: Outcome) -> Option<usize> {
    Outcome::PER_EXPERIMENT.iter().position(|o| *o == outcome)
}

/// A copy of one experiment's totals, cheap enough to take under the engine lock.
#[derive(Debug, Clone, PartialEq)]
pub struct ExperimentSnapshot {
    /// The definition the totals belong to.
    pub def: Arc<ExperimentDef>,
    /// Exposed units per variant.
    pub units: Vec<u64>,
    /// Totals per metric, indexed like `def.metrics`.
    pub metrics: Vec<MetricTotals>,
    /// Outcomes of all valid events so far.
    pub outcomes: OutcomeCounts,
    /// Latest event time seen, if events carried times.
    pub last_event_time: Option<Micros>,
    /// Earliest event time seen: the experiment's start as far as the data says.
    pub first_event_time: Option<Micros>,
    /// Input positions (shard, next offset) the totals reflect, when merged across shards.
    pub positions: Vec<(String, i64)>,
}

impl ExperimentSnapshot {
    /// Whether no valid event reached this experiment.
    pub fn is_empty(&self) -> bool {
        self.outcomes.0.iter().all(|&n| n == 0)
    }

    /// Add `other`'s totals (the same experiment, from another shard) to these.
    pub fn merge(&mut self, other: &ExperimentSnapshot) {
        for (a, b) in self.units.iter_mut().zip(&other.units) {
            *a += b;
        }
        for (a, b) in self.metrics.iter_mut().zip(&other.metrics) {
            match (a, b) {
                (MetricTotals::Conversion(a), MetricTotals::Conversion(b)) => {
                    for (x, y) in a.iter_mut().zip(b) {
                        x.trials += y.trials;
                        x.successes += y.successes;
                    }
                }
                (MetricTotals::Defect(a), MetricTotals::Defect(b)) => {
                    for (x, y) in a.iter_mut().zip(b) {
                        x.count += y.count;
                        x.exposure += y.exposure;
                    }
                }
                _ => {}
            }
        }
        for (a, b) in self.outcomes.0.iter_mut().zip(&other.outcomes.0) {
            *a += b;
        }
        self.last_event_time = match (self.last_event_time, other.last_event_time) {
            (Some(a), Some(b)) => Some(a.max(b)),
            (a, b) => a.or(b),
        };
        self.first_event_time = match (self.first_event_time, other.first_event_time) {
            (Some(a), Some(b)) => Some(a.min(b)),
            (a, b) => a.or(b),
        };
    }
}

/// An event resolved against its experiment: indices instead of names, amounts checked.
#[derive(Debug, Clone, Copy)]
enum Resolved {
    Exposure {
        variant: usize,
        unit: u64,
    },
    Conversion {
        metric: usize,
        bit: u8,
        unit: u64,
    },
    UnitDefect {
        metric: usize,
        unit: u64,
        count: u64,
        exposure: f64,
    },
    VariantDefect {
        metric: usize,
        variant: usize,
        count: u64,
        exposure: f64,
    },
    TallyTrials {
        metric: usize,
        variant: usize,
        trials: u64,
        successes: u64,
    },
}

/// The live state of one experiment.
#[derive(Debug, Clone)]
pub struct ExperimentState {
    def: Arc<ExperimentDef>,
    /// For each metric, its bit in `UnitSlot` if it is a conversion metric.
    conversion_bit: Vec<Option<u8>>,
    units: UnitTable,
    /// Hashes of the ids of applied events.
    seen_ids: IdSet,
    variant_units: Vec<u64>,
    metrics: Vec<MetricTotals>,
    outcomes: OutcomeCounts,
    last_event_time: Option<Micros>,
    first_event_time: Option<Micros>,
    /// Where the experiment is in its evaluation cadence (not stored: a restored experiment
    /// restarts its cadence).
    clock: cadence::Clock,
}

impl ExperimentState {
    /// Empty state for `def`.
    pub fn new(def: Arc<ExperimentDef>) -> ExperimentState {
        let n_variants = def.variants.len();
        let mut next_bit = 0u8;
        let conversion_bit = def
            .metrics
            .iter()
            .map(|m| match m.kind {
                MetricKind::Conversion => {
                    let bit = next_bit;
                    next_bit += 1;
                    Some(bit)
                }
                MetricKind::DefectRate(_) => None,
            })
            .collect();
        let metrics = def
            .metrics
            .iter()
            .map(|m| match m.kind {
                MetricKind::Conversion => {
                    MetricTotals::Conversion(vec![ConversionTotals::default(); n_variants])
                }
                MetricKind::DefectRate(_) => {
                    MetricTotals::Defect(vec![DefectTotals::default(); n_variants])
                }
            })
            .collect();
        ExperimentState {
            def,
            conversion_bit,
            units: UnitTable::default(),
            seen_ids: IdSet::default(),
            variant_units: vec![0; n_variants],
            metrics,
            outcomes: OutcomeCounts::default(),
            last_event_time: None,
            first_event_time: None,
            clock: Default::default(),
        }
    }

    /// The experiment's definition.
    pub fn def(&self) -> &Arc<ExperimentDef> {
        &self.def
    }

    /// Carry this state over to `def`, a redefinition that keeps every variant and metric in
    /// order and may append more (checked by `ExperimentDef::incompatibility` before).
    ///
    /// A metric appended to a running experiment counts every unit exposed so far as a trial
    /// (conversion) or as exposure (`exposure = "units"`), because those units were exposed;
    /// conversions and defects from before it existed were not recorded, so its early rate
    /// leans low — docs/api.md carries that caution.
    pub fn redefine(&mut self, def: Arc<ExperimentDef>) -> Result<(), image::ImageMismatch> {
        let image = self.image();
        let mut state = ExperimentState::from_image(Arc::clone(&def), image)?;
        std::mem::swap(self, &mut state);
        Ok(())
    }

    /// Pad variant and metric totals, restored for a prefix of the definition, to its full
    /// shape (see [`ExperimentState::redefine`] for what appended metrics start from).
    fn pad_to_def(&mut self) {
        let n = self.def.variants.len();
        self.variant_units.resize(n, 0);
        for t in &mut self.metrics {
            match t {
                MetricTotals::Conversion(v) => v.resize(n, ConversionTotals::default()),
                MetricTotals::Defect(v) => v.resize(n, DefectTotals::default()),
            }
        }
        for m in &self.def.metrics[self.metrics.len()..] {
            self.metrics.push(match m.kind {
                MetricKind::Conversion => MetricTotals::Conversion(
                    self.variant_units
                        .iter()
                        .map(|&u| ConversionTotals {
                            trials: u,
                            successes: 0,
                        })
                        .collect(),
                ),
                MetricKind::DefectRate(basis) => MetricTotals::Defect(
                    self.variant_units
                        .iter()
                        .map(|&u| DefectTotals {
                            count: 0,
                            exposure: if basis == ExposureBasis::Units {
                                u as f64
                            } else {
                                0.0
                            },
                        })
                        .collect(),
                ),
            });
        }
    }

    /// Number of distinct units tracked.
    pub fn n_units(&self) -> usize {
        self.units.len()
    }

    /// A copy of the totals (not the unit table).
    pub fn snapshot(&self) -> ExperimentSnapshot {
        ExperimentSnapshot {
            def: Arc::clone(&self.def),
            units: self.variant_units.clone(),
            metrics: self.metrics.clone(),
            outcomes: self.outcomes,
            last_event_time: self.last_event_time,
            first_event_time: self.first_event_time,
            positions: Vec::new(),
        }
    }

    /// The hashes of `event`'s unit and id, as the tables key them.
    #[inline]
    fn hashes(event: &Event<'_>) -> Hashes {
        let unit = match &event.body {
            EventBody::Exposure { unit, .. }
            | EventBody::Conversion { unit, .. }
            | EventBody::Outcome { unit, .. } => Some(unit),
            EventBody::Defect {
                target: Target::Unit(unit),
                ..
            } => Some(unit),
            _ => None,
        };
        Hashes {
            unit: unit.map(|u| key_hash(u)),
            id: event.id.as_deref().map(key_hash),
        }
    }

    /// Start loading the table entries of `hashes` (see [`UnitTable::prefetch`]).
    #[inline]
    fn prefetch(&self, hashes: &Hashes) {
        if let Some(h) = hashes.unit {
            self.units.prefetch(h);
        }
        if let Some(h) = hashes.id {
            self.seen_ids.prefetch(h);
        }
    }

    /// Apply one event addressed to this experiment.
    ///
    /// An invalid event changes nothing and does not consume its id, so a corrected resend
    /// with the same id still counts.
    pub fn apply(&mut self, event: &Event<'_>) -> Result<Outcome, Reject> {
        self.apply_hashed(event, Self::hashes(event))
    }

    /// [`ExperimentState::apply`] with the event's hashes already computed.
    fn apply_hashed(&mut self, event: &Event<'_>, hashes: Hashes) -> Result<Outcome, Reject> {
        let resolved = self.resolve(&event.body, hashes.unit)?;
        let id_hash = hashes.id;
        let outcome = match id_hash {
            Some(h) if self.seen_ids.contains(h) => Outcome::DuplicateId,
            _ => self.apply_resolved(resolved)?,
        };
        if outcome == Outcome::Applied {
            if let Some(h) = id_hash {
                self.seen_ids.insert(h);
            }
        }
        if let Some(t) = event.time {
            self.last_event_time = Some(self.last_event_time.map_or(t, |old| old.max(t)));
            self.first_event_time = Some(self.first_event_time.map_or(t, |old| old.min(t)));
        }
        self.outcomes.bump(outcome);
        Ok(outcome)
    }

    fn variant(&self, name: &str) -> Result<usize, Reject> {
        self.def.variant_index(name).ok_or_else(|| {
            Reject::new(
                RejectReason::UnknownVariant,
                format!("experiment `{}` has no variant `{name}`", self.def.id),
            )
        })
    }

    fn metric(&self, name: &str) -> Result<usize, Reject> {
        self.def.metric_index(name).ok_or_else(|| {
            Reject::new(
                RejectReason::UnknownMetric,
                format!("experiment `{}` has no metric `{name}`", self.def.id),
            )
        })
    }

    fn kind_mismatch(&self, metric: usize, what: &str) -> Reject {
        let m = &self.def.metrics[metric];
        Reject::new(
            RejectReason::MetricKindMismatch,
            format!(
                "metric `{}` is a {} metric; {what}",
                m.name,
                m.kind.as_str()
            ),
        )
    }

    /// `unit_hash` is `key_hash` of the body's unit, when the caller has it already.
    fn resolve(&self, body: &EventBody<'_>, unit_hash: Option<u64>) -> Result<Resolved, Reject> {
        let unit_key = |unit: &str| unit_hash.unwrap_or_else(|| key_hash(unit));
        match body {
            EventBody::Exposure { variant, unit } => Ok(Resolved::Exposure {
                variant: self.variant(variant)?,
                unit: unit_key(unit),
            }),
            EventBody::Conversion { metric, unit } => {
                let metric = self.metric(metric)?;
                let bit = self.conversion_bit[metric].ok_or_else(|| {
                    self.kind_mismatch(metric, "conversion events need a conversion metric")
                })?;
                Ok(Resolved::Conversion {
                    metric,
                    bit,
                    unit: unit_key(unit),
                })
            }
            EventBody::Outcome {
                metric,
                unit,
                count,
                exposure,
            } => {
                let metric = self.metric(metric)?;
                Ok(match self.conversion_bit[metric] {
                    Some(bit) => Resolved::Conversion {
                        metric,
                        bit,
                        unit: unit_key(unit),
                    },
                    None => Resolved::UnitDefect {
                        metric,
                        unit: unit_key(unit),
                        count: *count,
                        exposure: self.defect_exposure(metric, *exposure, "defect")?,
                    },
                })
            }
            EventBody::Defect {
                metric,
                target,
                count,
                exposure,
            } => {
                let metric = self.metric(metric)?;
                let exposure = self.defect_exposure(metric, *exposure, "defect")?;
                Ok(match target {
                    Target::Unit(unit) => Resolved::UnitDefect {
                        metric,
                        unit: unit_key(unit),
                        count: *count,
                        exposure,
                    },
                    Target::Variant(variant) => Resolved::VariantDefect {
                        metric,
                        variant: self.variant(variant)?,
                        count: *count,
                        exposure,
                    },
                })
            }
            EventBody::Tally {
                metric,
                variant,
                amounts,
            } => {
                let metric = self.metric(metric)?;
                let variant = self.variant(variant)?;
                match *amounts {
                    TallyAmounts::Trials { trials, successes } => {
                        if self.conversion_bit[metric].is_none() {
                            return Err(self.kind_mismatch(
                                metric,
                                "a tally for it carries `count`/`exposure`, not `trials`/`successes`",
                            ));
                        }
                        if successes > trials {
                            return Err(Reject::new(
                                RejectReason::SuccessesExceedTrials,
                                format!("tally has successes {successes} > trials {trials}"),
                            ));
                        }
                        Ok(Resolved::TallyTrials {
                            metric,
                            variant,
                            trials,
                            successes,
                        })
                    }
                    TallyAmounts::Defects { count, exposure } => {
                        let exposure = self.defect_exposure(metric, exposure, "tally")?;
                        Ok(Resolved::VariantDefect {
                            metric,
                            variant,
                            count,
                            exposure,
                        })
                    }
                }
            }
        }
    }

    /// Checks that a defect-style event fits the metric and returns the exposure it adds.
    fn defect_exposure(
        &self,
        metric: usize,
        exposure: Option<f64>,
        what: &str,
    ) -> Result<f64, Reject> {
        let m = &self.def.metrics[metric];
        match (m.kind, exposure) {
            (MetricKind::Conversion, _) => Err(self.kind_mismatch(
                metric,
                &format!("a {what} for it needs a defect_rate metric"),
            )),
            (MetricKind::DefectRate(ExposureBasis::Reported), Some(x)) => Ok(x),
            (MetricKind::DefectRate(ExposureBasis::Reported), None) => Err(Reject::new(
                RejectReason::ExposureRequired,
                format!(
                    "metric `{}` counts reported exposure; the {what} needs `exposure`",
                    m.name
                ),
            )),
            (MetricKind::DefectRate(ExposureBasis::Units), None) => Ok(0.0),
            (MetricKind::DefectRate(ExposureBasis::Units), Some(_)) => Err(Reject::new(
                RejectReason::ExposureNotAllowed,
                format!(
                    "metric `{}` takes its exposure from exposed units; drop `exposure` from the {what}",
                    m.name
                ),
            )),
        }
    }

    fn apply_resolved(&mut self, resolved: Resolved) -> Result<Outcome, Reject> {
        match resolved {
            Resolved::Exposure { variant, unit } => Ok(
                match self.units.get_or_insert(unit, UnitSlot::new(variant)) {
                    Some(slot) if slot.variant() == variant => Outcome::DuplicateExposure,
                    Some(_) => Outcome::Crossover,
                    None => {
                        self.variant_units[variant] += 1;
                        for (def, totals) in self.def.metrics.iter().zip(&mut self.metrics) {
                            match totals {
                                MetricTotals::Conversion(v) => v[variant].trials += 1,
                                MetricTotals::Defect(v) => {
                                    if def.kind == MetricKind::DefectRate(ExposureBasis::Units) {
                                        v[variant].exposure += 1.0;
                                    }
                                }
                            }
                        }
                        Outcome::Applied
                    }
                },
            ),
            Resolved::Conversion { metric, bit, unit } => {
                let Some(slot) = self.units.mark_converted(unit, bit) else {
                    return Ok(Outcome::Orphan);
                };
                if slot.converted(bit) {
                    return Ok(Outcome::DuplicateConversion);
                }
                if let MetricTotals::Conversion(v) = &mut self.metrics[metric] {
                    v[slot.variant()].successes += 1;
                }
                Ok(Outcome::Applied)
            }
            Resolved::UnitDefect {
                metric,
                unit,
                count,
                exposure,
            } => {
                let Some(slot) = self.units.get(unit) else {
                    return Ok(Outcome::Orphan);
                };
                self.add_defects(metric, slot.variant(), count, exposure)
            }
            Resolved::VariantDefect {
                metric,
                variant,
                count,
                exposure,
            } => self.add_defects(metric, variant, count, exposure),
            Resolved::TallyTrials {
                metric,
                variant,
                trials,
                successes,
            } => {
                let MetricTotals::Conversion(v) = &mut self.metrics[metric] else {
                    unreachable!("resolve checked the metric kind");
                };
                let t = &mut v[variant];
                let (Some(new_trials), Some(new_successes)) = (
                    t.trials.checked_add(trials),
                    t.successes.checked_add(successes),
                ) else {
                    return Err(overflow());
                };
                t.trials = new_trials;
                t.successes = new_successes;
                Ok(Outcome::Applied)
            }
        }
    }

    fn add_defects(
        &mut self,
        metric: usize,
        variant: usize,
        count: u64,
        exposure: f64,
    ) -> Result<Outcome, Reject> {
        let MetricTotals::Defect(v) = &mut self.metrics[metric] else {
            unreachable!("resolve checked the metric kind");
        };
        let t = &mut v[variant];
        let new_count = t.count.checked_add(count).ok_or_else(overflow)?;
        let new_exposure = t.exposure + exposure;
        if !new_exposure.is_finite() {
            return Err(overflow());
        }
        t.count = new_count;
        t.exposure = new_exposure;
        Ok(Outcome::Applied)
    }
}

fn overflow() -> Reject {
    Reject::new(
        RejectReason::TooLarge,
        "the increment would overflow the running total",
    )
}

/// The table keys of one event (unit and id hashes), computed once for both the prefetch and
/// the update.
#[derive(Debug, Clone, Copy, Default)]
struct Hashes {
    unit: Option<u64>,
    id: Option<u64>,
}

/// An event looked up ahead of its turn: its experiment's position and its table keys, with
/// the table entries already asked for ([`Engine::prepare`]). Valid only for the engine that
/// made it, until that engine's set of experiments changes (callers hold the lock throughout).
#[derive(Debug, Clone, Copy)]
pub struct Prepared {
    idx: usize,
    hashes: Hashes,
}

/// All experiments posteriord watches, addressed by id.
#[derive(Debug, Default)]
pub struct Engine {
    experiments: Vec<ExperimentState>,
    /// Position of each experiment by the hash of its id: one hash per event instead of
    /// SipHash over the name. An id whose hash another id already took is in `collided`.
    index: HashMap<u64, usize, PassThrough>,
    collided: Vec<usize>,
    /// Every unit's memberships (experiment position, second of first exposure), for outcomes
    /// that name no experiment.
    members: members::Members,
    /// The memberships of the outcome being attributed (kept to reuse its allocation).
    scratch: Vec<(u32, members::ExposureSecs)>,
}

impl Engine {
    /// An engine watching `defs` (ids must be unique; config validation guarantees it).
    pub fn new(defs: impl IntoIterator<Item = ExperimentDef>) -> Engine {
        Engine::with_defs(defs.into_iter().map(Arc::new))
    }

    /// An engine over shared definitions (one set of definitions serves every shard).
    pub fn with_defs(defs: impl IntoIterator<Item = Arc<ExperimentDef>>) -> Engine {
        let mut engine = Engine {
            experiments: defs.into_iter().map(ExperimentState::new).collect(),
            ..Engine::default()
        };
        engine.reindex();
        engine
    }

    /// Rebuild the index after the set of experiments changed (rare: definitions at run time).
    fn reindex(&mut self) {
        self.index.clear();
        self.collided.clear();
        for (idx, e) in self.experiments.iter().enumerate() {
            match self.index.entry(key_hash(&e.def.id)) {
                std::collections::hash_map::Entry::Vacant(v) => {
                    v.insert(idx);
                }
                std::collections::hash_map::Entry::Occupied(_) => self.collided.push(idx),
            }
        }
    }

    /// Position of experiment `id`.
    #[inline]
    fn position(&self, id: &str) -> Option<usize> {
        if let Some(&i) = self.index.get(&key_hash(id)) {
            if self.experiments[i].def.id == id {
                return Some(i);
            }
        }
        self.collided
            .iter()
            .copied()
            .find(|&i| self.experiments[i].def.id == id)
    }

    /// Replace the state of one experiment (restore from a stored image), with its units'
    /// exposure seconds as the image kept them.
    ///
    /// `exposures: None` (an image of a format that did not keep them): the units rejoin the
    /// membership index as exposed at second 0, so an outcome cannot be found to precede the
    /// exposure of a unit exposed before that image was taken.
    pub fn replace(
        &mut self,
        state: ExperimentState,
        exposures: Option<Vec<image::ExposureRecord>>,
    ) {
        if let Some(idx) = self.position(&state.def.id) {
            let x = idx as u32;
            // An experiment's memberships are its exposed units: with none there is nothing
            // to drop, and a restore (every experiment replaced in turn) skips a pass over
            // the whole index per experiment.
            if !self.experiments[idx].units.is_empty() {
                self.members.retain_map(|m| (m != x).then_some(m));
            }
            match exposures {
                Some(records) => {
                    self.members.reserve(records.len());
                    for image::ExposureRecord { key, secs } in records {
                        self.members.insert(key, x, secs);
                    }
                }
                None => {
                    self.members.reserve(state.units.len());
                    for (unit, _) in state.units.iter() {
                        self.members.insert(unit, x, 0);
                    }
                }
            }
            self.experiments[idx] = state;
        }
    }

    /// The membership index split by experiment position: each experiment's units with the
    /// second of their first exposure (one pass over the index, for images).
    pub fn exposures_by_experiment(&self) -> Vec<Vec<image::ExposureRecord>> {
        let mut out = vec![Vec::new(); self.experiments.len()];
        for (key, x, secs) in self.members.iter() {
            if let Some(v) = out.get_mut(x as usize) {
                v.push(image::ExposureRecord { key, secs });
            }
        }
        out
    }

    /// Watch `def` too, or redefine the experiment of that id: a new generation starts empty,
    /// the same generation carries its state over (see [`ExperimentState::redefine`]; when
    /// that is refused the experiment starts empty and the reason is returned).
    pub fn define(&mut self, def: Arc<ExperimentDef>) -> Option<image::ImageMismatch> {
        let Some(idx) = self.position(&def.id) else {
            self.experiments.push(ExperimentState::new(def));
            self.reindex();
            return None;
        };
        let state = &mut self.experiments[idx];
        let x = idx as u32;
        if state.def.generation == def.generation {
            if let Err(m) = state.redefine(Arc::clone(&def)) {
                *state = ExperimentState::new(def);
                self.members.retain_map(|m| (m != x).then_some(m));
                return Some(m);
            }
        } else {
            *state = ExperimentState::new(def);
            self.members.retain_map(|m| (m != x).then_some(m));
        }
        None
    }

    /// Stop watching experiment `id`; returns its state, if it was watched.
    pub fn remove(&mut self, id: &str) -> Option<ExperimentState> {
        let idx = self.position(id)?;
        let state = self.experiments.remove(idx);
        let x = idx as u32;
        self.members.retain_map(|m| match m.cmp(&x) {
            std::cmp::Ordering::Less => Some(m),
            std::cmp::Ordering::Equal => None,
            std::cmp::Ordering::Greater => Some(m - 1),
        });
        self.reindex();
        Some(state)
    }

    /// Make room in the membership index for `n` more memberships (restores: one resize
    /// instead of many).
    pub fn reserve_memberships(&mut self, n: usize) {
        self.members.reserve(n);
    }

    /// Number of (unit, experiment) memberships in the index.
    pub fn n_memberships(&self) -> usize {
        self.members.len()
    }

    /// Heap bytes of the membership index.
    pub fn membership_bytes(&self) -> usize {
        self.members.heap_bytes()
    }

    /// Apply one decoded event.
    pub fn apply(&mut self, event: &Event<'_>) -> Result<Outcome, Reject> {
        self.apply_prepared(event, None)
    }

    /// Look `event` up a few events before applying it: find its experiment, hash its keys
    /// and ask for the table entries it will touch, so that they are in cache by its turn.
    /// `None` for an unknown experiment.
    #[inline]
    pub fn prepare(&self, event: &Event<'_>) -> Option<Prepared> {
        if event.attributed() {
            if let EventBody::Outcome { unit, .. } = &event.body {
                self.members.prefetch(key_hash(unit));
            }
            return None;
        }
        let idx = self.position(&event.experiment)?;
        let hashes = ExperimentState::hashes(event);
        self.experiments[idx].prefetch(&hashes);
        Some(Prepared { idx, hashes })
    }

    /// [`Engine::apply`], with `prepared` from [`Engine::prepare`] of this event, if any.
    pub fn apply_prepared(
        &mut self,
        event: &Event<'_>,
        prepared: Option<Prepared>,
    ) -> Result<Outcome, Reject> {
        self.apply_inner(event, prepared, None, &mut Vec::new())
    }

    /// The one application path: attribution for outcomes naming no experiment, the named
    /// experiment otherwise; with a cadence, the snapshot of each experiment made due.
    fn apply_inner(
        &mut self,
        event: &Event<'_>,
        prepared: Option<Prepared>,
        cadence: Option<&cadence::Cadence>,
        due: &mut Vec<ExperimentSnapshot>,
    ) -> Result<Outcome, Reject> {
        if event.attributed() {
            return self.attribute(event, cadence, due);
        }
        let Some((idx, hashes)) = self.locate(event, prepared) else {
            return Err(Reject::new(
                RejectReason::UnknownExperiment,
                format!("no experiment `{}` is configured", event.experiment),
            ));
        };
        let e = &mut self.experiments[idx];
        // Before a configured start no event can belong to the experiment; refused before it
        // touches the counts or the clock, so an early stamp cannot lengthen its duration.
        if let (Some(start), Some(t)) = (e.def.rules.start, event.time) {
            if t < start {
                return Err(Reject::new(
                    RejectReason::BeforeStart,
                    format!(
                        "time is {:.1} h before experiment `{}`'s configured start",
                        (start - t) as f64 / 3.6e9,
                        event.experiment
                    ),
                ));
            }
        }
        let r = e.apply_hashed(event, hashes);
        if let (Ok(Outcome::Applied), EventBody::Exposure { .. }, Some(unit)) =
            (&r, &event.body, hashes.unit)
        {
            let secs = members::exposure_secs(event.time.unwrap_or(0));
            self.members.insert(unit, idx as u32, secs);
        }
        if let Some(cadence) = cadence {
            let e = &mut self.experiments[idx];
            if r.is_ok() && e.clock.tick(cadence, event.time) {
                due.push(e.snapshot());
            }
        }
        r
    }

    /// Apply an outcome naming no experiment to every experiment that defines its metric and
    /// exposed its unit at or before its time (compared at whole seconds), within the
    /// experiment's attribution window if it has one.
    ///
    /// Returns `Applied` when it counted anywhere; otherwise the nearest miss, in the order
    /// duplicate conversion (or id), outside the window, before the exposure, unexposed; a
    /// reject only when every experiment that would take it refused it.
    fn attribute(
        &mut self,
        event: &Event<'_>,
        cadence: Option<&cadence::Cadence>,
        due: &mut Vec<ExperimentSnapshot>,
    ) -> Result<Outcome, Reject> {
        let EventBody::Outcome { metric, .. } = &event.body else {
            unreachable!("attributed() holds only for outcomes");
        };
        let Some(time) = event.time else {
            return Err(Reject::new(
                RejectReason::MissingField,
                "an outcome naming no experiment needs a time, to compare with the unit's exposures",
            ));
        };
        let hashes = ExperimentState::hashes(event);
        let unit = hashes.unit.expect("an outcome names its unit");
        let at = members::exposure_secs(time);
        let mut found = std::mem::take(&mut self.scratch);
        found.clear();
        self.members.for_each(unit, |x, secs| found.push((x, secs)));
        // Ask for every member experiment's table entries before touching any: the unit's
        // experiments are unrelated tables, so their memory waits overlap instead of adding up.
        for &(x, _) in &found {
            self.experiments[x as usize].prefetch(&hashes);
        }
        fn rank(o: Outcome) -> u8 {
            match o {
                Outcome::Applied => 4,
                Outcome::DuplicateConversion | Outcome::DuplicateId => 3,
                Outcome::OutsideWindow => 2,
                Outcome::BeforeExposure => 1,
                _ => 0,
            }
        }
        let mut best = Outcome::Unexposed;
        let mut refused = None;
        for &(x, secs) in &found {
            let e = &mut self.experiments[x as usize];
            if e.def.metric_index(metric).is_none() {
                continue;
            }
            let outcome = if secs > at {
                Outcome::BeforeExposure
            } else if e
                .def
                .rules
                .attribution_window
                .is_some_and(|w| i64::from(at - secs) * 1_000_000 > w)
            {
                Outcome::OutsideWindow
            } else {
                match e.apply_hashed(event, hashes) {
                    Ok(o) => {
                        if let Some(cadence) = cadence {
                            if e.clock.tick(cadence, event.time) {
                                due.push(e.snapshot());
                            }
                        }
                        o
                    }
                    Err(r) => {
                        refused.get_or_insert(r);
                        continue;
                    }
                }
            };
            if rank(outcome) > rank(best) {
                best = outcome;
            }
        }
        self.scratch = found;
        match refused {
            Some(r) if rank(best) < rank(Outcome::DuplicateConversion) => Err(r),
            _ => Ok(best),
        }
    }

    fn locate(&self, event: &Event<'_>, prepared: Option<Prepared>) -> Option<(usize, Hashes)> {
        match prepared {
            Some(p) => {
                debug_assert_eq!(self.experiments[p.idx].def.id, event.experiment.as_ref());
                Some((p.idx, p.hashes))
            }
            None => Some((
                self.position(&event.experiment)?,
                ExperimentState::hashes(event),
            )),
        }
    }

    /// Apply one decoded event and, when it is valid and makes its experiment due under
    /// `cadence`, return the experiment's snapshot as of this event. O(1) and allocation-free
    /// unless due (the snapshot copies totals, never the unit table). `prepared` is what
    /// [`Engine::prepare`] found for this event, if it was looked up ahead.
    ///
    /// An outcome naming no experiment can make several experiments due: each snapshot is
    /// pushed on `due`.
    pub fn apply_due(
        &mut self,
        event: &Event<'_>,
        prepared: Option<Prepared>,
        cadence: &cadence::Cadence,
        due: &mut Vec<ExperimentSnapshot>,
    ) -> Result<Outcome, Reject> {
        self.apply_inner(event, prepared, Some(cadence), due)
    }

    /// The experiment called `id`.
    pub fn experiment(&self, id: &str) -> Option<&ExperimentState> {
        self.position(id).map(|i| &self.experiments[i])
    }

    /// All experiments, in configuration order.
    pub fn experiments(&self) -> impl Iterator<Item = &ExperimentState> {
        self.experiments.iter()
    }
}

#[cfg(test)]
mod tests;
