//! The config file as written: serde structs that only check shape (keys, types), with spans so
//! that the validation step can name the line of a bad value.

use std::collections::BTreeMap;

use serde::Deserialize;
use toml::Spanned;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawConfig {
    #[serde(default)]
    pub http: RawHttp,
    pub kafka: Option<Spanned<RawKafka>>,
    #[serde(default)]
    pub store: RawStore,
    #[serde(default)]
    pub experiment: Vec<Spanned<RawExperiment>>,
    #[serde(default)]
    pub alerts: RawAlerts,
    #[serde(default)]
    pub shutdown: RawShutdown,
    #[serde(default)]
    pub history: RawHistory,
    #[serde(default)]
    pub source: Vec<Spanned<RawSource>>,
    #[serde(default)]
    pub event_time: RawEventTime,
}

/// `[event_time]`: how far event time may stray from its reference, with per-source
/// overrides in `[event_time.http]` and `[event_time.kafka]`.
#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawEventTime {
    pub max_ahead_secs: Option<Spanned<i64>>,
    pub max_behind_days: Option<Spanned<f64>>,
    pub on_skew: Option<Spanned<String>>,
    pub http: Option<RawTimeBounds>,
    pub kafka: Option<RawTimeBounds>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawTimeBounds {
    pub max_ahead_secs: Option<Spanned<i64>>,
    pub max_behind_days: Option<Spanned<f64>>,
    pub on_skew: Option<Spanned<String>>,
}

/// `[[source]]`: a field mapping for a team's own events (see `crate::mapping`).
#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawSource {
    pub name: Spanned<String>,
    pub topics: Option<Spanned<Vec<Spanned<String>>>>,
    pub unit: Option<Spanned<String>>,
    pub time: Option<Spanned<String>>,
    pub event: Option<Spanned<String>>,
    pub experiment: Option<Spanned<String>>,
    pub variant: Option<Spanned<String>>,
    pub count: Option<Spanned<String>>,
    pub exposure: Option<Spanned<String>>,
    pub id: Option<Spanned<String>>,
    pub time_format: Option<Spanned<String>>,
    pub exposures: Option<Spanned<Vec<String>>>,
    #[serde(default)]
    pub constants: BTreeMap<String, Spanned<String>>,
    #[serde(default)]
    pub metrics: BTreeMap<String, Spanned<String>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawHistory {
    pub arm_points: Option<Spanned<i64>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawShutdown {
    pub grace_secs: Option<Spanned<i64>>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawAlerts {
    pub hold_down_secs: Option<Spanned<i64>>,
    pub evaluate_every_secs: Option<Spanned<i64>>,
    pub evaluate_every_events: Option<Spanned<i64>>,
    #[serde(default)]
    pub webhook: Vec<Spanned<RawWebhook>>,
    pub kafka: Option<Spanned<RawAlertsKafka>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawWebhook {
    pub url: Spanned<String>,
    pub secret_env: Spanned<String>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawAlertsKafka {
    pub topic: Spanned<String>,
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawHttp {
    pub addr: Option<Spanned<String>>,
    pub max_body_bytes: Option<Spanned<i64>>,
    pub token_file: Option<Spanned<String>>,
    pub protect_reads: Option<Spanned<bool>>,
    pub request_timeout_secs: Option<Spanned<i64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawKafka {
    pub brokers: Option<Spanned<String>>,
    pub topics: Option<Spanned<Vec<Spanned<String>>>>,
    pub group: Option<Spanned<String>>,
    pub max_event_bytes: Option<Spanned<i64>>,
    pub dead_letter_topic: Option<Spanned<String>>,
    pub changelog_topic: Option<Spanned<String>>,
    pub changelog_interval_ms: Option<Spanned<i64>>,
    pub outcome_lateness_secs: Option<Spanned<i64>>,
    pub idle_allowance_secs: Option<Spanned<i64>>,
    #[serde(default)]
    pub properties: BTreeMap<String, Spanned<PropertyValue>>,
}

/// librdkafka properties are strings, but TOML users write numbers and booleans bare.
#[derive(Debug, Deserialize)]
#[serde(untagged)]
pub(super) enum PropertyValue {
    Text(String),
    Integer(i64),
    Bool(bool),
    Float(f64),
}

#[derive(Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawStore {
    pub dir: Option<Spanned<String>>,
    pub snapshot_interval_ms: Option<Spanned<i64>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawExperiment {
    pub id: Spanned<String>,
    pub control: Option<Spanned<String>>,
    pub variants: Spanned<Vec<Spanned<RawVariant>>>,
    #[serde(default)]
    pub metric: Vec<Spanned<RawMetric>>,
    pub primary: Option<Spanned<String>>,
    pub guardrails: Option<Spanned<Vec<String>>>,
    pub srm_p: Option<Spanned<f64>>,
    pub max_crossover_share: Option<Spanned<f64>>,
    pub equivalence_probability: Option<Spanned<f64>>,
    pub max_duration_days: Option<Spanned<f64>>,
    pub attribution_window_hours: Option<Spanned<f64>>,
    pub min_duration_days: Option<Spanned<f64>>,
    pub start: Option<Spanned<String>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawVariant {
    pub name: Spanned<String>,
    pub weight: Option<Spanned<f64>>,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(super) enum RawKind {
    Conversion,
    DefectRate,
}

#[derive(Debug, Clone, Copy, Deserialize)]
#[serde(rename_all = "snake_case")]
pub(super) enum RawExposure {
    Units,
    Reported,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawMetric {
    pub name: Spanned<String>,
    pub kind: Spanned<RawKind>,
    pub exposure: Option<Spanned<RawExposure>>,
    pub prior: Option<Spanned<RawPrior>>,
    #[serde(default)]
    pub variant_priors: BTreeMap<String, Spanned<RawPrior>>,
    pub rules: Option<Spanned<RawRules>>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawRules {
    pub min_units: Option<Spanned<i64>>,
    pub min_exposure: Option<Spanned<f64>>,
    pub harm: Option<Spanned<RawHarm>>,
    pub ship: Option<Spanned<RawShip>>,
    pub rope: Option<Spanned<f64>>,
    pub clear: Option<Spanned<RawToggle<RawClear>>>,
    pub harm_evidence: Option<Spanned<RawToggle<RawEvidence>>>,
}

/// A rule that is on by default: `false` turns it off, a table sets it.
#[derive(Debug, Deserialize)]
#[serde(untagged)]
pub(super) enum RawToggle<T> {
    Flag(bool),
    Table(T),
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawClear {
    pub margin: Option<f64>,
    pub probability: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawEvidence {
    pub alpha: Option<f64>,
    pub margin: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawHarm {
    pub probability: Option<f64>,
    pub margin: Option<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawShip {
    pub threshold_of_caring: f64,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
pub(super) struct RawPrior {
    pub alpha: Option<f64>,
    pub beta: Option<f64>,
    pub shape: Option<f64>,
    pub rate: Option<f64>,
}
