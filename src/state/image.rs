//! Images of experiment state: everything needed to rebuild an [`ExperimentState`] exactly
//! (unit table, applied ids, totals, outcome counters), as plain data for the store to encode.

use std::fmt;
use std::sync::Arc;

use super::units::{IdSet, UnitSlot, UnitTable};
use super::{ExperimentSnapshot, ExperimentState, MetricTotals, OutcomeCounts};
use crate::event::Micros;
use crate::experiment::{ExperimentDef, MetricKind};

/// One unit of an image: its id hash and packed slot, in 12 bytes (a `(u64, u32)` pair would
/// be padded to 16, a third more for every unit saved, published or restored).
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
#[repr(C, packed(4))]
pub struct UnitRecord {
    /// Hash of the unit id.
    pub key: u64,
    /// `UnitSlot` raw value.
    pub raw: u32,
}

/// One membership of an image: the unit's id hash and the second of its first exposure
/// ([`super::members::ExposureSecs`]), packed to 12 bytes like [`UnitRecord`].
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
#[repr(C, packed(4))]
pub struct ExposureRecord {
    /// Hash of the unit id.
    pub key: u64,
    /// Second of the unit's first exposure in the experiment.
    pub secs: u32,
}

/// The complete state of one experiment as plain data.
#[derive(Debug, Clone, PartialEq)]
pub struct ExperimentImage {
    /// Experiment id.
    pub id: String,
    /// Variant names, in the order unit slots index them.
    pub variants: Vec<String>,
    /// Metric names and kinds, in the order totals are stored.
    pub metrics: Vec<(String, MetricKind)>,
    /// Unit hash → packed slot, 12 bytes each.
    pub units: Vec<UnitRecord>,
    /// Hashes of applied event ids.
    pub seen_ids: Vec<u64>,
    /// Exposed units per variant.
    pub variant_units: Vec<u64>,
    /// Totals per metric.
    pub totals: Vec<MetricTotals>,
    /// Outcome counters.
    pub outcomes: OutcomeCounts,
    /// Latest event time seen.
    pub last_event_time: Option<Micros>,
    /// Earliest event time seen.
    pub first_event_time: Option<Micros>,
    /// The second of each exposed unit's first exposure (the shard's membership index for
    /// this experiment), or `None` from a format that did not keep them: those units then
    /// count as exposed since the epoch.
    pub exposures: Option<Vec<ExposureRecord>>,
}

/// Why an image does not fit the configured definition.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ImageMismatch {
    /// Experiment id.
    pub id: String,
    /// What differs.
    pub reason: String,
}

impl fmt::Display for ImageMismatch {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "stored state of experiment `{}` does not fit its configuration: {}",
            self.id, self.reason
        )
    }
}

impl std::error::Error for ImageMismatch {}

impl ExperimentImage {
    /// The totals of this image as a snapshot of `def`, if the image fits the definition.
    pub fn totals_snapshot(&self, def: &Arc<ExperimentDef>) -> Option<ExperimentSnapshot> {
        let variants_match = self.variants.len() == def.variants.len()
            && self
                .variants
                .iter()
                .zip(&def.variants)
                .all(|(a, b)| *a == b.name);
        let metrics_match = self.metrics.len() == def.metrics.len()
            && self
                .metrics
                .iter()
                .zip(&def.metrics)
                .all(|((name, kind), m)| *name == m.name && *kind == m.kind);
        if !(variants_match && metrics_match && self.totals.len() == def.metrics.len()) {
            return None;
        }
        Some(ExperimentSnapshot {
            def: Arc::clone(def),
            units: self.variant_units.clone(),
            metrics: self.totals.clone(),
            outcomes: self.outcomes,
            last_event_time: self.last_event_time,
            first_event_time: self.first_event_time,
            positions: Vec::new(),
        })
    }
}

impl ExperimentState {
    /// The complete state as an image.
    pub fn image(&self) -> ExperimentImage {
        ExperimentImage {
            id: self.def.state_key(),
            variants: self.def.variants.iter().map(|v| v.name.clone()).collect(),
            metrics: self
                .def
                .metrics
                .iter()
                .map(|m| (m.name.clone(), m.kind))
                .collect(),
            units: self
                .units
                .iter()
                .map(|(key, s)| UnitRecord { key, raw: s.raw() })
                .collect(),
            seen_ids: self.seen_ids.iter().collect(),
            variant_units: self.variant_units.clone(),
            totals: self.metrics.clone(),
            outcomes: self.outcomes,
            last_event_time: self.last_event_time,
            first_event_time: self.first_event_time,
            // The shard's engine holds the memberships and fills these in.
            exposures: None,
        }
    }

    /// Rebuild the state of `def` from `image`.
    ///
    /// The image's variants and metrics must be those of `def` by name, kind and order, or a
    /// prefix of them (the definition gained variants or metrics since the image was taken;
    /// see [`ExperimentState::redefine`]): unit slots store variant indices and
    /// conversion-flag positions, so a reordered definition would silently move units
    /// between arms.
    pub fn from_image(
        def: Arc<ExperimentDef>,
        image: ExperimentImage,
    ) -> Result<ExperimentState, ImageMismatch> {
        let id = def.id.clone();
        let mismatch = |reason: String| ImageMismatch {
            id: id.clone(),
            reason,
        };
        let variants: Vec<&str> = def.variants.iter().map(|v| v.name.as_str()).collect();
        if image.variants.len() > variants.len()
            || image.variants[..] != variants[..image.variants.len()]
        {
            return Err(mismatch(format!(
                "variants were {:?}, are now {:?}",
                image.variants, variants
            )));
        }
        let metrics: Vec<(String, MetricKind)> = def
            .metrics
            .iter()
            .map(|m| (m.name.clone(), m.kind))
            .collect();
        if image.metrics.len() > metrics.len()
            || image.metrics[..] != metrics[..image.metrics.len()]
        {
            return Err(mismatch(format!(
                "metrics were {:?}, are now {:?}",
                image.metrics, metrics
            )));
        }
        let n = image.variants.len();
        let shapes_ok = image.variant_units.len() == n
            && image.totals.len() == image.metrics.len()
            && image
                .totals
                .iter()
                .zip(&image.metrics)
                .all(|(t, (_, kind))| match (t, kind) {
                    (MetricTotals::Conversion(v), MetricKind::Conversion) => v.len() == n,
                    (MetricTotals::Defect(v), MetricKind::DefectRate(_)) => v.len() == n,
                    _ => false,
                });
        if !shapes_ok {
            return Err(mismatch(
                "totals do not match the variants and metrics".into(),
            ));
        }
        let mut state = ExperimentState::new(Arc::clone(&def));
        // Room for an eighth more units: a restored experiment is usually still running,
        // and a table filled to its limit would grow (old and new table side by side) at
        // its first new unit.
        let n_units = image.units.len();
        let mut units = UnitTable::with_capacity(n_units + n_units / 8);
        for UnitRecord { key, raw } in image.units {
            let slot = UnitSlot::from_raw(raw);
            if slot.variant() >= n {
                return Err(mismatch(format!(
                    "a unit is in variant #{} of {n}",
                    slot.variant()
                )));
            }
            units.get_or_insert(key, slot);
        }
        state.units = units;
        let mut seen = IdSet::with_capacity(image.seen_ids.len());
        for id in image.seen_ids {
            seen.insert(id);
        }
        state.seen_ids = seen;
        state.variant_units = image.variant_units;
        state.metrics = image.totals;
        state.outcomes = image.outcomes;
        state.last_event_time = image.last_event_time;
        state.first_event_time = image.first_event_time;
        state.pad_to_def();
        Ok(state)
    }
}
