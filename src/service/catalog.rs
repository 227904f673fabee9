//! Experiments defined at run time (`PUT`/`DELETE /v1/experiments/{id}`): their definitions,
//! the archive of deleted and restarted ones, and the file that keeps both across restarts.
//!
//! The file `experiments.json` in the store directory holds, per API experiment, the JSON
//! body it was last defined with and its generation; per archived experiment its definition
//! and totals (posteriors can be recomputed from totals; the unit table is not kept). It is
//! replaced atomically before any change takes effect in memory, while the shard lock is
//! held, so the archive's totals and the switch to the new definition are one step as far
//! as ingest can tell. Config-file experiments are never stored here; on an id clash the
//! file's definition wins.
//!
//! With several instances (Kafka), each publishes its catalog (without archives) on the
//! changelog topic after every change and adopts the others' per experiment, the newer
//! definition winning and a deletion winning over older definitions (see [`Service::adopt_catalog`]).

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::Arc;

use serde_json::{json, Map, Value};

use super::store::{write_atomic, StoreError};
use super::Service;
use crate::config::{experiment_from_json, ConfigError};
use crate::event::Outcome;
use crate::experiment::ExperimentDef;
use crate::state::{
    ConversionTotals, DefectTotals, ExperimentSnapshot, MetricTotals, OutcomeCounts,
};

/// Largest catalog message, below the common 1 MB message limit.
pub const MAX_CATALOG_BYTES: usize = 900 * 1024;

/// Name of the catalog file in the store directory.
pub const FILE_NAME: &str = "experiments.json";

/// What the store's health calls the catalog file.
pub const CATALOG_FILE: &str = FILE_NAME;

const FORMAT_VERSION: u64 = 1;

/// Why a change was refused.
#[derive(Debug, thiserror::Error)]
pub enum CatalogError {
    /// The body is not a valid experiment.
    #[error("{0}")]
    Invalid(ConfigError),
    /// A body field outside the experiment table is wrong.
    #[error("`{key}`: {message}")]
    BadField {
        /// The field.
        key: &'static str,
        /// What is wrong.
        message: String,
    },
    /// The id belongs to a config-file experiment, which the API does not change.
    #[error(
        "experiment `{0}` is defined in the config file, which wins over the API; change it there"
    )]
    DefinedInConfig(String),
    /// The change would reinterpret counted state.
    #[error("experiment `{id}` is running and {reason}; send \"restart\": true to archive its state and start afresh")]
    NeedsRestart {
        /// Experiment id.
        id: String,
        /// What changes.
        reason: String,
    },
    /// No such API experiment.
    #[error("no experiment `{0}`")]
    Unknown(String),
    /// The catalog file could not be written; nothing changed.
    #[error("the definition could not be stored, nothing changed: {0}")]
    NotDurable(#[from] StoreError),
}

/// One experiment defined over the API.
#[derive(Debug, Clone)]
struct Entry {
    generation: u32,
    /// The JSON body it was last defined with (without `restart`).
    definition: Value,
    created_at: i64,
    updated_at: i64,
}

/// One archived experiment: its definition and totals when it was archived.
#[derive(Debug, Clone)]
pub struct Archived {
    /// Experiment id.
    pub id: String,
    /// 1, 2, ... per id, in archiving order.
    pub number: u32,
    /// Why: `deleted` or `restarted`.
    pub reason: &'static str,
    /// When (µs since the epoch).
    pub archived_at: i64,
    /// The definition, with its generation.
    pub def: Arc<ExperimentDef>,
    definition: Value,
    /// The totals it had, merged across the shards held here.
    pub snapshot: ExperimentSnapshot,
}

/// Runtime definitions and the archive.
#[derive(Debug, Default, Clone)]
pub struct Catalog {
    path: Option<PathBuf>,
    file_ids: BTreeSet<String>,
    active: BTreeMap<String, Entry>,
    archived: Vec<Archived>,
    /// Last generation used per id; survives deletion so a re-created experiment never picks
    /// up stored state of an older one.
    generations: BTreeMap<String, u32>,
    /// When each id was last deleted (µs): a definition from another instance that is older
    /// than the deletion does not bring it back.
    deleted: BTreeMap<String, i64>,
    /// This instance's name on the changelog (random, kept with the catalog).
    instance: String,
}

fn new_instance_id() -> String {
    format!("{:016x}", rand::random::<u64>())
}

/// What a `PUT` did.
#[derive(Debug)]
pub struct PutOutcome {
    /// Whether the experiment is new (not a redefinition).
    pub created: bool,
    /// Its generation now.
    pub generation: u32,
    /// The archive made of the old state, with `"restart": true`.
    pub archived: Option<u32>,
    /// Variants and metrics appended to a running experiment.
    pub added_variants: Vec<String>,
    /// See `added_variants`.
    pub added_metrics: Vec<String>,
}

fn totals_json(s: &ExperimentSnapshot) -> Value {
    let mut outcomes = Map::new();
    for o in Outcome::PER_EXPERIMENT {
        outcomes.insert(o.as_str().into(), json!(s.outcomes.get(o)));
    }
    json!({
        "units": s.units,
        "metrics": s.metrics.iter().map(|m| match m {
            MetricTotals::Conversion(v) => json!({"conversion": v.iter().map(|t| [t.trials, t.successes]).collect::<Vec<_>>()}),
            MetricTotals::Defect(v) => json!({"defect": v.iter().map(|t| json!([t.count, t.exposure])).collect::<Vec<_>>()}),
        }).collect::<Vec<_>>(),
        "outcomes": outcomes,
        "first_event_time": s.first_event_time,
        "last_event_time": s.last_event_time,
    })
}

fn snapshot_from_json(def: &Arc<ExperimentDef>, v: &Value) -> Option<ExperimentSnapshot> {
    let n = def.variants.len();
    let units: Vec<u64> = serde_json::from_value(v.get("units")?.clone()).ok()?;
    let mut metrics = Vec::new();
    for m in v.get("metrics")?.as_array()? {
        if let Some(c) = m.get("conversion") {
            let pairs: Vec<(u64, u64)> = serde_json::from_value(c.clone()).ok()?;
            metrics.push(MetricTotals::Conversion(
                pairs
                    .into_iter()
                    .map(|(trials, successes)| ConversionTotals { trials, successes })
                    .collect(),
            ));
        } else {
            let pairs: Vec<(u64, f64)> = serde_json::from_value(m.get("defect")?.clone()).ok()?;
            metrics.push(MetricTotals::Defect(
                pairs
                    .into_iter()
                    .map(|(count, exposure)| DefectTotals { count, exposure })
                    .collect(),
            ));
        }
    }
    let mut outcomes = OutcomeCounts::default();
    for (i, o) in Outcome::PER_EXPERIMENT.iter().enumerate() {
        outcomes.0[i] = v["outcomes"][o.as_str()].as_u64().unwrap_or(0);
    }
    let shapes_ok = units.len() == n
        && metrics.len() == def.metrics.len()
        && metrics.iter().all(|m| match m {
            MetricTotals::Conversion(v) => v.len() == n,
            MetricTotals::Defect(v) => v.len() == n,
        });
    shapes_ok.then(|| ExperimentSnapshot {
        def: Arc::clone(def),
        units,
        metrics,
        outcomes,
        last_event_time: v["last_event_time"].as_i64(),
        first_event_time: v["first_event_time"].as_i64(),
        positions: Vec::new(),
    })
}

fn define(id: &str, definition: &Value, generation: u32) -> Result<ExperimentDef, ConfigError> {
    let mut def = experiment_from_json(id, definition)?;
    def.generation = generation;
    Ok(def)
}

impl Catalog {
    /// An empty catalog kept in memory only (the demo), beside config-file experiments
    /// `file_ids`.
    pub fn in_memory(file_ids: impl IntoIterator<Item = String>) -> Catalog {
        Catalog {
            file_ids: file_ids.into_iter().collect(),
            instance: new_instance_id(),
            ..Catalog::default()
        }
    }

    /// The catalog stored in `dir` (empty if none is). Returns it with the definitions to
    /// watch; stored definitions whose id the config file now defines are kept in the file
    /// but not used, and reported in the returned warnings.
    pub fn load(
        dir: &Path,
        file_ids: impl IntoIterator<Item = String>,
    ) -> Result<(Catalog, Vec<ExperimentDef>, Vec<String>), StoreError> {
        let mut catalog = Catalog::in_memory(file_ids);
        let path = dir.join(FILE_NAME);
        catalog.path = Some(path.clone());
        let bytes = match std::fs::read(&path) {
            Ok(b) => b,
            Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
                return Ok((catalog, Vec::new(), Vec::new()))
            }
            Err(source) => return Err(StoreError::Io { path, source }),
        };
        let corrupt = |reason: String| {
            StoreError::Corrupt {
            reason: format!(
                "{reason}. Fix: restore it from a backup; or move it aside (`mv {p} {p}.damaged`) \
                 to start without the experiments defined over the API (define them again with PUT)",
                p = path.display()
            ),
            path: path.clone(),
        }
        };
        let doc: Value = serde_json::from_slice(&bytes).map_err(|e| corrupt(e.to_string()))?;
        if doc["version"].as_u64() != Some(FORMAT_VERSION) {
            return Err(corrupt(format!("unknown version {}", doc["version"])));
        }
        let mut defs = Vec::new();
        let mut warnings = Vec::new();
        if let Some(i) = doc["instance"].as_str() {
            catalog.instance = i.to_string();
        }
        if let Some(g) = doc["generations"].as_object() {
            for (id, n) in g {
                catalog
                    .generations
                    .insert(id.clone(), n.as_u64().unwrap_or(0) as u32);
            }
        }
        if let Some(d) = doc["deleted"].as_object() {
            for (id, at) in d {
                catalog.deleted.insert(id.clone(), at.as_i64().unwrap_or(0));
            }
        }
        for e in doc["experiments"].as_array().into_iter().flatten() {
            let id = e["id"].as_str().unwrap_or_default().to_string();
            let generation = e["generation"].as_u64().unwrap_or(0) as u32;
            let def = define(&id, &e["definition"], generation)
                .map_err(|err| corrupt(format!("experiment `{id}`: {err}")))?;
            let last = catalog.generations.entry(id.clone()).or_insert(0);
            *last = (*last).max(generation);
            if catalog.file_ids.contains(&id) {
                warnings.push(format!(
                    "experiment `{id}` is defined both in the config file and over the API; the config file's definition is used (the API one stays stored, unused)"
                ));
            } else {
                defs.push(def);
            }
            catalog.active.insert(
                id,
                Entry {
                    generation,
                    definition: e["definition"].clone(),
                    created_at: e["created_at"].as_i64().unwrap_or(0),
                    updated_at: e["updated_at"].as_i64().unwrap_or(0),
                },
            );
        }
        for a in doc["archived"].as_array().into_iter().flatten() {
            let id = a["id"].as_str().unwrap_or_default().to_string();
            let generation = a["generation"].as_u64().unwrap_or(0) as u32;
            let def = Arc::new(
                define(&id, &a["definition"], generation)
                    .map_err(|err| corrupt(format!("archived experiment `{id}`: {err}")))?,
            );
            let snapshot = snapshot_from_json(&def, &a["totals"])
                .ok_or_else(|| corrupt(format!("archived experiment `{id}`: bad totals")))?;
            catalog.archived.push(Archived {
                id,
                number: a["number"].as_u64().unwrap_or(0) as u32,
                reason: if a["reason"] == "restarted" {
                    "restarted"
                } else {
                    "deleted"
                },
                archived_at: a["archived_at"].as_i64().unwrap_or(0),
                def,
                definition: a["definition"].clone(),
                snapshot,
            });
        }
        Ok((catalog, defs, warnings))
    }

    fn to_json(&self) -> Value {
        json!({
            "version": FORMAT_VERSION,
            "experiments": self.active.iter().map(|(id, e)| json!({
                "id": id,
                "generation": e.generation,
                "created_at": e.created_at,
                "updated_at": e.updated_at,
                "definition": e.definition,
            })).collect::<Vec<_>>(),
            "archived": self.archived.iter().map(|a| json!({
                "id": a.id,
                "number": a.number,
                "generation": a.def.generation,
                "reason": a.reason,
                "archived_at": a.archived_at,
                "definition": a.definition,
                "totals": totals_json(&a.snapshot),
            })).collect::<Vec<_>>(),
            "generations": self.generations,
            "deleted": self.deleted,
            "instance": self.instance,
        })
    }

    /// What other instances are sent: definitions, deletions and generations (archives hold
    /// this instance's totals and stay here).
    fn wire(&self) -> Value {
        let mut v = self.to_json();
        if let Some(m) = v.as_object_mut() {
            m.remove("archived");
        }
        v
    }

    fn save(&self) -> Result<(), StoreError> {
        let Some(path) = &self.path else {
            return Ok(());
        };
        let bytes = serde_json::to_vec_pretty(&self.to_json()).expect("JSON values serialize");
        write_atomic(path, &bytes)
    }

    /// Whether `id` is an experiment defined over the API (and in use).
    pub fn is_api(&self, id: &str) -> bool {
        self.active.contains_key(id) && !self.file_ids.contains(id)
    }

    /// Archived experiments, oldest first.
    pub fn archived(&self) -> &[Archived] {
        &self.archived
    }

    /// Archive `number` of `id`, or its latest with `None`.
    pub fn archive(&self, id: &str, number: Option<u32>) -> Option<&Archived> {
        self.archived
            .iter()
            .rev()
            .find(|a| a.id == id && number.is_none_or(|n| n == a.number))
    }

    fn push_archive(
        &mut self,
        snapshot: ExperimentSnapshot,
        reason: &'static str,
        now: i64,
    ) -> u32 {
        let id = snapshot.def.id.clone();
        let number = self
            .archived
            .iter()
            .filter(|a| a.id == id)
            .map(|a| a.number)
            .max()
            .unwrap_or(0)
            + 1;
        let definition = self
            .active
            .get(&id)
            .map_or(Value::Null, |e| e.definition.clone());
        self.archived.push(Archived {
            id,
            number,
            reason,
            archived_at: now,
            def: Arc::clone(&snapshot.def),
            definition,
            snapshot,
        });
        number
    }
}

/// One experiment as another instance sent it.
struct RemoteEntry {
    id: String,
    entry: Entry,
}

impl Service {
    /// `PUT /v1/experiments/{id}`: create or redefine an API experiment from `body`.
    pub fn define_experiment(&self, id: &str, mut body: Value) -> Result<PutOutcome, CatalogError> {
        let restart = match body.as_object_mut().and_then(|m| m.remove("restart")) {
            None | Some(Value::Null) => false,
            Some(Value::Bool(b)) => b,
            Some(other) => {
                return Err(CatalogError::BadField {
                    key: "restart",
                    message: format!("must be true or false, got {other}"),
                })
            }
        };
        let mut def = define(id, &body, 0).map_err(CatalogError::Invalid)?;
        let now = super::now_micros();
        // Lock order: catalog, then shards.
        let mut catalog = self.lock_catalog();
        if catalog.file_ids.contains(id) {
            return Err(CatalogError::DefinedInConfig(id.to_string()));
        }
        let mut shards = self.lock_shards();
        let old = catalog
            .active
            .get(id)
            .and_then(|_| shards.defs().iter().find(|d| d.id == id).cloned());
        let snapshot = shards.snapshot(id);
        let running = snapshot.as_ref().is_some_and(|s| !s.is_empty());
        let mut next = catalog.clone();
        let last = next.generations.get(id).copied().unwrap_or(0);
        let mut outcome = PutOutcome {
            created: old.is_none(),
            generation: 0,
            archived: None,
            added_variants: Vec::new(),
            added_metrics: Vec::new(),
        };
        match &old {
            Some(old) if !restart => match old.incompatibility(&def) {
                // Appends and rule changes keep the generation (so instances that receive the
                // same bodies agree on it) and the state.
                None => {
                    outcome.added_variants = def.variants[old.variants.len()..]
                        .iter()
                        .map(|v| v.name.clone())
                        .collect();
                    outcome.added_metrics = def.metrics[old.metrics.len()..]
                        .iter()
                        .map(|m| m.name.clone())
                        .collect();
                    def.generation = old.generation;
                }
                Some(reason) if running => {
                    return Err(CatalogError::NeedsRestart {
                        id: id.to_string(),
                        reason,
                    })
                }
                // Nothing counted yet: any change is safe, and a fresh generation keeps stored
                // state of the old shape out.
                Some(_) => def.generation = last + 1,
            },
            Some(_) => {
                if let Some(s) = snapshot.filter(|s| !s.is_empty()) {
                    outcome.archived = Some(next.push_archive(s, "restarted", now));
                }
                def.generation = last + 1;
            }
            None => def.generation = last + 1,
        }
        outcome.generation = def.generation;
        next.generations.insert(id.to_string(), def.generation);
        let created_at = next.active.get(id).map_or(now, |e| e.created_at);
        next.active.insert(
            id.to_string(),
            Entry {
                generation: def.generation,
                definition: body,
                created_at,
                updated_at: now,
            },
        );
        // Stored before it takes effect: a failed write changes nothing.
        self.note_catalog(next.save())?;
        for (shard, m) in shards.define(def) {
            tracing::error!(%shard, "{m}; that experiment starts empty in this shard");
        }
        drop(shards);
        *catalog = next;
        drop(catalog);
        if outcome.archived.is_some() {
            self.save_soon();
        }
        self.publish_catalog();
        Ok(outcome)
    }

    /// Store the HTTP shard now, so its write-ahead log stops holding events of the archived
    /// generation sooner than the next snapshot would: after a crash those would be replayed into
    /// the new generation (stored state of an older generation itself is never restored into a
    /// newer one). Kafka shards are left to the consumer, which must deliver dead letters before
    /// it stores an offset past them.
    fn save_soon(&self) {
        if !self.save_http_shard() {
            tracing::warn!(
                "some shards could not be saved after an archive; the next snapshot retries"
            );
        }
    }

    /// Record the result of writing the catalog file in the store's health.
    fn note_catalog(&self, result: Result<(), StoreError>) -> Result<(), StoreError> {
        self.health.note(CATALOG_FILE, &result);
        result
    }

    /// `DELETE /v1/experiments/{id}`: archive an API experiment; returns the archive number.
    pub fn delete_experiment(&self, id: &str) -> Result<u32, CatalogError> {
        let now = super::now_micros();
        let mut catalog = self.lock_catalog();
        if catalog.file_ids.contains(id) {
            return Err(CatalogError::DefinedInConfig(id.to_string()));
        }
        if !catalog.active.contains_key(id) {
            return Err(CatalogError::Unknown(id.to_string()));
        }
        let mut shards = self.lock_shards();
        let snapshot = shards
            .snapshot(id)
            .ok_or_else(|| CatalogError::Unknown(id.to_string()))?;
        let mut next = catalog.clone();
        let number = next.push_archive(snapshot, "deleted", now);
        next.active.remove(id);
        next.deleted.insert(id.to_string(), now);
        self.note_catalog(next.save())?;
        shards.undefine(id);
        drop(shards);
        *catalog = next;
        drop(catalog);
        self.save_soon();
        self.publish_catalog();
        Ok(number)
    }

    /// Send the catalog to the other instances (with Kafka; waits for delivery).
    pub fn publish_catalog(&self) {
        let Some(publisher) = self.catalog_publisher() else {
            return;
        };
        let (instance, wire) = {
            let c = self.lock_catalog();
            if c.active.is_empty() && c.deleted.is_empty() {
                // Nothing was ever defined here: nothing for others to learn.
                return;
            }
            (c.instance.clone(), c.wire())
        };
        let bytes = serde_json::to_vec(&wire).expect("JSON values serialize");
        if bytes.len() > MAX_CATALOG_BYTES {
            tracing::error!(
                bytes = bytes.len(),
                "the experiment catalog is too large to publish; other instances do not see its changes"
            );
            return;
        }
        publisher(&instance, &bytes);
    }

    /// Adopt what another instance published (`bytes`): per id, the newer of its definition and
    /// ours wins (by `updated_at`), and a deletion wins over older definitions. State this
    /// instance counted under a definition that is replaced by another generation, or deleted,
    /// is archived here first. Our own publications come back too and change nothing.
    pub fn adopt_catalog(&self, bytes: &[u8]) {
        let Ok(doc) = serde_json::from_slice::<Value>(bytes) else {
            tracing::warn!("ignoring an unreadable experiment catalog on the changelog");
            return;
        };
        if doc["version"].as_u64() != Some(FORMAT_VERSION) {
            tracing::warn!(version = %doc["version"], "ignoring an experiment catalog of an unknown version");
            return;
        }
        let remote: Vec<RemoteEntry> = doc["experiments"]
            .as_array()
            .into_iter()
            .flatten()
            .filter_map(|e| {
                Some(RemoteEntry {
                    id: e["id"].as_str()?.to_string(),
                    entry: Entry {
                        generation: e["generation"].as_u64()? as u32,
                        definition: e["definition"].clone(),
                        created_at: e["created_at"].as_i64().unwrap_or(0),
                        updated_at: e["updated_at"].as_i64()?,
                    },
                })
            })
            .collect();
        let now = super::now_micros();
        let mut catalog = self.lock_catalog();
        let mut shards = self.lock_shards();
        let mut next = catalog.clone();
        let mut changed = false;
        if let Some(g) = doc["generations"].as_object() {
            for (id, n) in g {
                let n = n.as_u64().unwrap_or(0) as u32;
                let last = next.generations.entry(id.clone()).or_insert(0);
                if n > *last {
                    *last = n;
                    changed = true;
                }
            }
        }
        for r in remote {
            let newer = match next.active.get(&r.id) {
                Some(l) => r.entry.updated_at > l.updated_at,
                None => next
                    .deleted
                    .get(&r.id)
                    .is_none_or(|&d| r.entry.updated_at > d),
            };
            if !newer {
                continue;
            }
            let def = match define(&r.id, &r.entry.definition, r.entry.generation) {
                Ok(d) => d,
                Err(e) => {
                    tracing::warn!(experiment = %r.id, error = %e, "ignoring another instance's definition");
                    continue;
                }
            };
            changed = true;
            let shadowed = next.file_ids.contains(&r.id);
            if !shadowed {
                let local_gen = next.active.get(&r.id).map(|l| l.generation);
                if local_gen.is_some_and(|g| g != def.generation) {
                    if let Some(s) = shards.snapshot(&r.id).filter(|s| !s.is_empty()) {
                        next.push_archive(s, "restarted", now);
                    }
                }
                tracing::info!(experiment = %r.id, generation = def.generation, "experiment defined on another instance");
                for (shard, m) in shards.define(def) {
                    tracing::error!(%shard, "{m}; that experiment starts empty in this shard");
                }
            }
            next.active.insert(r.id, r.entry);
        }
        for (id, at) in doc["deleted"].as_object().into_iter().flatten() {
            let at = at.as_i64().unwrap_or(0);
            if next.deleted.get(id).is_some_and(|&d| d >= at) {
                continue;
            }
            next.deleted.insert(id.clone(), at);
            changed = true;
            if next.active.get(id).is_some_and(|l| l.updated_at < at) {
                if !next.file_ids.contains(id) {
                    if let Some(s) = shards.snapshot(id) {
                        next.push_archive(s, "deleted", now);
                    }
                    shards.undefine(id);
                    tracing::info!(experiment = %id, "experiment deleted on another instance");
                }
                next.active.remove(id);
            }
        }
        if !changed {
            return;
        }
        if let Err(e) = self.note_catalog(next.save()) {
            tracing::error!(error = %e, "cannot store the experiment catalog adopted from another instance; it holds until the next start");
        }
        drop(shards);
        *catalog = next;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn service() -> Service {
        Service::in_memory(&crate::config::Config::parse("", "t.toml", &[]).unwrap())
    }

    fn wire(s: &Service) -> Vec<u8> {
        serde_json::to_vec(&s.lock_catalog().wire()).unwrap()
    }

    /// Per id the newer definition wins, a deletion wins over older definitions, and
    /// adopting one's own catalog again changes nothing.
    #[test]
    fn catalogs_merge_newest_first_and_deletions_stick() {
        let (a, b) = (service(), service());
        let body = json!({"variants": [{"name": "control"}, {"name": "tray"}],
                          "metric": [{"name": "plant", "kind": "conversion"}]});
        a.define_experiment("orchard-sprout-tray", body.clone())
            .unwrap();
        let first = wire(&a);
        b.adopt_catalog(&first);
        let def = b
            .lock_shards()
            .defs()
            .iter()
            .find(|d| d.id == "orchard-sprout-tray")
            .cloned();
        assert_eq!(def.unwrap().generation, 1);
        b.adopt_catalog(&wire(&b));
        assert!(b.lock_catalog().is_api("orchard-sprout-tray"));
        a.delete_experiment("orchard-sprout-tray").unwrap();
        b.adopt_catalog(&wire(&a));
        assert!(!b.lock_shards().has_experiment("orchard-sprout-tray"));
        // The older definition arriving late does not bring it back.
        b.adopt_catalog(&first);
        assert!(!b.lock_shards().has_experiment("orchard-sprout-tray"));
        // A newer definition does, under a newer generation.
        a.define_experiment("orchard-sprout-tray", body).unwrap();
        b.adopt_catalog(&wire(&a));
        let def = b
            .lock_shards()
            .defs()
            .iter()
            .find(|d| d.id == "orchard-sprout-tray")
            .cloned();
        assert_eq!(def.unwrap().generation, 2);
    }

    #[test]
    fn totals_survive_their_json_form() {
        let def = Arc::new(
            experiment_from_json(
                "orchard-sprout-tray",
                &json!({
                    "variants": [{"name": "control"}, {"name": "tray"}],
                    "metric": [{"name": "plant", "kind": "conversion"},
                               {"name": "crash", "kind": "defect_rate", "exposure": "reported"}]
                }),
            )
            .unwrap(),
        );
        let mut outcomes = OutcomeCounts::default();
        outcomes.0[0] = 7;
        let snap = ExperimentSnapshot {
            def: Arc::clone(&def),
            units: vec![3, 4],
            metrics: vec![
                MetricTotals::Conversion(vec![
                    ConversionTotals {
                        trials: 3,
                        successes: 1,
                    },
                    ConversionTotals {
                        trials: 4,
                        successes: 2,
                    },
                ]),
                MetricTotals::Defect(vec![
                    DefectTotals {
                        count: 2,
                        exposure: 10.5,
                    },
                    DefectTotals {
                        count: 0,
                        exposure: 0.25,
                    },
                ]),
            ],
            outcomes,
            last_event_time: Some(2_000),
            first_event_time: Some(1_000),
            positions: Vec::new(),
        };
        let back = snapshot_from_json(&def, &totals_json(&snap)).unwrap();
        assert_eq!(back, snap);
    }
}
