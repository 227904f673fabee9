//! Configuration: TOML file → shape-checked raw structs (`raw`) → validated [`Config`], then
//! `POSTERIORD_*` environment overrides for deployment.
//!
//! Every error names the key and, for file values, the line, so that `check-config` can point
//! an operator at the exact spot.

mod json;
mod raw;

pub use json::{experiment_from_json, BODY_ORIGIN};

use std::collections::BTreeMap;
use std::fmt;
use std::net::SocketAddr;
use std::ops::Range;
use std::path::{Path, PathBuf};

use toml::Spanned;

use crate::decode::DEFAULT_MAX_EVENT_BYTES;
use crate::experiment::{
    ClearRule, EvidenceRule, ExperimentDef, ExperimentRules, ExposureBasis, HarmRule, MetricDef,
    MetricKind, MetricRules, Prior, ShipRule, VariantDef, DEFAULT_CLEAR_MARGIN,
    DEFAULT_CLEAR_PROBABILITY, DEFAULT_EQUIVALENCE_PROBABILITY, DEFAULT_EVIDENCE_ALPHA,
    DEFAULT_HARM_PROBABILITY, DEFAULT_MAX_CROSSOVER_SHARE, DEFAULT_MIN_DURATION, DEFAULT_SRM_P,
    MAX_CONVERSION_METRICS, MAX_METRICS, MAX_VARIANTS,
};
use raw::{PropertyValue, RawConfig, RawExperiment, RawExposure, RawKind, RawMetric, RawPrior};

/// Prefix of every environment override.
pub const ENV_PREFIX: &str = "POSTERIORD_";

/// Default HTTP listen address: loopback only, so a first start exposes nothing.
pub const DEFAULT_HTTP_ADDR: &str = "127.0.0.1:8080";

/// Default bound on an HTTP request body.
pub const DEFAULT_MAX_BODY_BYTES: usize = 16 * 1024 * 1024;

/// Default consumer group.
pub const DEFAULT_KAFKA_GROUP: &str = "posteriord";

/// Default state directory.
pub const DEFAULT_STORE_DIR: &str = "./posteriord-data";

/// Default time between state snapshots: bounds how much input is re-read after a crash.
pub const DEFAULT_SNAPSHOT_INTERVAL_MS: u64 = 5_000;

/// Default time between changelog publications: bounds how much input a new owner re-reads
/// after an instance dies, and how stale other instances' reads of its partitions are.
pub const DEFAULT_CHANGELOG_INTERVAL_MS: u64 = 10_000;

/// The validated configuration.
#[derive(Debug, Clone, PartialEq)]
pub struct Config {
    /// HTTP API settings.
    pub http: HttpConfig,
    /// Kafka source, if configured.
    pub kafka: Option<KafkaConfig>,
    /// Where state is kept.
    pub store: StoreConfig,
    /// The experiments to watch.
    pub experiments: Vec<ExperimentDef>,
    /// Alert evaluation and lifecycle.
    pub alerts: AlertsConfig,
    /// Longest a SIGTERM drain may take before the process gives up and exits 1.
    pub shutdown_grace: std::time::Duration,
    /// `[history] arm_points`: how many arm-points (one variant's numbers at one evaluation)
    /// each experiment's history keeps across its metrics.
    pub history_arm_points: usize,
    /// `[[source]]`: field mappings for a team's own events, by name.
    pub sources: Vec<SourceConfig>,
    /// `[event_time]`: how far event time may stray from its reference, per source.
    pub event_time: EventTimeConfig,
}

/// `[event_time]`, resolved per source (the table's keys, overridden by `[event_time.http]`
/// and `[event_time.kafka]`).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct EventTimeConfig {
    /// Events posted over HTTP, checked against their receive time.
    pub http: crate::state::skew::TimeBounds,
    /// Events read from Kafka, checked against their record's timestamp; also what `replay`
    /// uses, since its inputs are topic dumps.
    pub kafka: crate::state::skew::TimeBounds,
}

/// One `[[source]]`: a mapping and the Kafka topics read with it.
#[derive(Debug, Clone, PartialEq)]
pub struct SourceConfig {
    /// How the source's events read.
    pub mapping: crate::mapping::Mapping,
    /// Kafka topics whose events are read with this mapping.
    pub topics: Vec<String>,
}

impl Config {
    /// The source called `name`.
    pub fn source(&self, name: &str) -> Option<&SourceConfig> {
        self.sources.iter().find(|s| s.mapping.name == name)
    }
}

/// Default `[history] arm_points`: about 230 KiB per experiment once full.
pub const DEFAULT_HISTORY_ARM_POINTS: usize = crate::history::ARM_POINT_BUDGET;

/// Default drain budget; the deploy kit gives 45 s before a forced kill.
pub const DEFAULT_SHUTDOWN_GRACE_SECS: u64 = 30;

/// `[alerts]`.
#[derive(Debug, Clone, PartialEq)]
pub struct AlertsConfig {
    /// How long a finding must stay away before its alert closes.
    pub hold_down: std::time::Duration,
    /// How often an experiment's rules are evaluated, in event time (the events' own
    /// timestamps, not the wall clock).
    pub evaluate_every: std::time::Duration,
    /// An experiment is also evaluated once this many events reached it since its last
    /// evaluation (whichever comes first; never per event).
    pub evaluate_every_events: u64,
    /// Webhooks that receive alert events.
    pub webhooks: Vec<WebhookConfig>,
    /// Kafka topic that receives alert events (brokers from `[kafka]`).
    pub kafka_topic: Option<String>,
}

/// `[[alerts.webhook]]`.
#[derive(Clone, PartialEq)]
pub struct WebhookConfig {
    /// Where alert events are POSTed.
    pub url: String,
    /// Name of the environment variable holding the signing secret.
    pub secret_env: String,
    /// The HMAC-SHA256 key (never logged): the bytes after `whsec_` base64-decoded when the
    /// variable holds a Standard Webhooks secret, else the variable's bytes as they are.
    pub secret: Vec<u8>,
}

impl std::fmt::Debug for WebhookConfig {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("WebhookConfig")
            .field("url", &self.url)
            .field("secret_env", &self.secret_env)
            .field("secret", &"<redacted>")
            .finish()
    }
}

impl Default for AlertsConfig {
    fn default() -> Self {
        AlertsConfig {
            hold_down: std::time::Duration::from_secs(DEFAULT_HOLD_DOWN_SECS),
            evaluate_every: std::time::Duration::from_secs(DEFAULT_EVALUATE_EVERY_SECS),
            evaluate_every_events: DEFAULT_EVALUATE_EVERY_EVENTS,
            webhooks: Vec::new(),
            kafka_topic: None,
        }
    }
}

impl AlertsConfig {
    /// The evaluation cadence these settings give (event time in µs, or a count).
    pub fn cadence(&self) -> crate::state::cadence::Cadence {
        crate::state::cadence::Cadence::new(
            self.evaluate_every.as_micros() as i64,
            self.evaluate_every_events,
        )
    }

    /// The hold-down in µs, as the alert book counts it.
    pub fn hold_down_micros(&self) -> crate::event::Micros {
        self.hold_down.as_micros() as i64
    }

    /// An empty alert book with these settings' hold-down.
    pub fn alert_book(&self) -> crate::decide::alerts::AlertBook {
        crate::decide::alerts::AlertBook::new(self.hold_down_micros())
    }
}

/// Default hold-down: five minutes without the finding before an alert closes.
pub const DEFAULT_HOLD_DOWN_SECS: u64 = 300;
/// Default evaluation cadence.
pub const DEFAULT_EVALUATE_EVERY_SECS: u64 = 60;
/// Default event-count cadence.
pub const DEFAULT_EVALUATE_EVERY_EVENTS: u64 = 10_000;

/// `[http]`.
#[derive(Debug, Clone, PartialEq)]
pub struct HttpConfig {
    /// Listen address (port 0 picks a free port; the bound address is logged and printed).
    pub addr: SocketAddr,
    /// Largest accepted request body.
    pub max_body_bytes: usize,
    /// Bearer tokens that authorise writes (and reads with `protect_reads`): the lines of
    /// `http.token_file` plus `POSTERIORD_API_TOKENS`.
    pub tokens: ApiTokens,
    /// Whether reads need a token too.
    pub protect_reads: bool,
    /// Longest a request may take, body included, before it is answered 408.
    pub request_timeout: std::time::Duration,
}

impl HttpConfig {
    /// Defaults on `addr`: no token, open reads (see `DEFAULT_REQUEST_TIMEOUT_SECS`).
    pub fn on(addr: SocketAddr) -> HttpConfig {
        HttpConfig {
            addr,
            max_body_bytes: DEFAULT_MAX_BODY_BYTES,
            tokens: ApiTokens::default(),
            protect_reads: false,
            request_timeout: std::time::Duration::from_secs(DEFAULT_REQUEST_TIMEOUT_SECS),
        }
    }
}

/// Default request timeout: generous for a 16 MiB event batch on a slow link.
pub const DEFAULT_REQUEST_TIMEOUT_SECS: u64 = 30;

/// Shortest accepted API token: 16 characters keeps guessing out of reach for any
/// random token (common practice is 32 random bytes, hex or base64).
pub const MIN_TOKEN_LEN: usize = 16;

/// API bearer tokens; `Debug` never shows them.
#[derive(Clone, Default, PartialEq)]
pub struct ApiTokens(pub Vec<String>);

impl std::fmt::Debug for ApiTokens {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ApiTokens(<{} redacted>)", self.0.len())
    }
}

/// Why a token is unusable, or `None`. Tokens travel in a header: printable ASCII only.
fn check_token(t: &str) -> Option<String> {
    if t.len() < MIN_TOKEN_LEN {
        return Some(format!(
            "a token has {} characters; use at least {MIN_TOKEN_LEN} (e.g. 32 random bytes in hex)",
            t.len()
        ));
    }
    if !t.bytes().all(|b| b.is_ascii_graphic()) {
        return Some("a token may hold only printable ASCII without spaces".into());
    }
    None
}

/// `[kafka]`.
#[derive(Debug, Clone, PartialEq)]
pub struct KafkaConfig {
    /// `bootstrap.servers`.
    pub brokers: String,
    /// Topics to consume.
    pub topics: Vec<String>,
    /// Consumer group id.
    pub group: String,
    /// Largest accepted message; larger ones are rejected as `too_large`.
    pub max_event_bytes: usize,
    /// Topic that receives refused messages with their reason in headers, if set.
    pub dead_letter_topic: Option<String>,
    /// Compacted topic holding each partition's state (default `<group>-changelog`).
    pub changelog_topic: String,
    /// How often changed partition state is published to the changelog (also on revocation
    /// and shutdown).
    pub changelog_interval: std::time::Duration,
    /// How far (event time) the business topics of co-partitioned `[[source]]`s may run
    /// ahead of the assignment topic before an outcome held for its exposure is decided on
    /// the exposures read so far.
    pub outcome_lateness: std::time::Duration,
    /// Co-partitioned topics are applied in record-timestamp order; a topic partition read to
    /// its end counts as having nothing before `now − idle_allowance`, so it never stalls the
    /// others for longer (see docs/events.md, "Order of application").
    pub idle_allowance: std::time::Duration,
    /// librdkafka properties passed through unchanged.
    pub properties: BTreeMap<String, String>,
}

/// Default `[kafka] outcome_lateness_secs` (see docs/events.md for why five minutes).
pub const DEFAULT_OUTCOME_LATENESS_SECS: u64 = 300;

/// Default `[kafka] idle_allowance_secs` (see docs/events.md for why thirty seconds).
pub const DEFAULT_IDLE_ALLOWANCE_SECS: u64 = 30;

/// `[store]`.
#[derive(Debug, Clone, PartialEq)]
pub struct StoreConfig {
    /// State directory.
    pub dir: PathBuf,
    /// How often changed state is written (also on revocation and shutdown).
    pub snapshot_interval: std::time::Duration,
}

/// A configuration error: where, which key, what is wrong.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ConfigError {
    /// File name (or `<env>` for environment overrides).
    pub origin: String,
    /// One-based line of the offending value, when it came from the file.
    pub line: Option<usize>,
    /// Dotted key, such as `experiment[0].variants[1].weight`.
    pub key: String,
    /// What is wrong and what is expected.
    pub message: String,
}

impl fmt::Display for ConfigError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self.line {
            Some(line) => write!(f, "{}:{line}: ", self.origin)?,
            None => write!(f, "{}: ", self.origin)?,
        }
        if self.key.is_empty() {
            write!(f, "{}", self.message)
        } else {
            write!(f, "`{}`: {}", self.key, self.message)
        }
    }
}

impl std::error::Error for ConfigError {}

/// The process environment: the `POSTERIORD_*` overrides, and the variables that config keys
/// such as `alerts.webhook.secret_env` name (values are never logged).
pub fn process_env() -> Vec<(String, String)> {
    std::env::vars().collect()
}

impl Config {
    /// Largest accepted encoded event (from `[kafka]`, else the default), for every source.
    pub fn max_event_bytes(&self) -> usize {
        self.kafka
            .as_ref()
            .map_or(crate::decode::DEFAULT_MAX_EVENT_BYTES, |k| {
                k.max_event_bytes
            })
    }

    /// Read, parse and validate the file at `path`, then apply `env` overrides.
    pub fn load(path: &Path, env: &[(String, String)]) -> Result<Config, ConfigError> {
        let origin = path.display().to_string();
        let text = std::fs::read_to_string(path).map_err(|e| ConfigError {
            origin: origin.clone(),
            line: None,
            key: String::new(),
            message: format!("cannot read the config file: {e}"),
        })?;
        Config::parse(&text, &origin, env)
    }

    /// Parse and validate `text`, then apply `env` overrides.
    pub fn parse(
        text: &str,
        origin: &str,
        env: &[(String, String)],
    ) -> Result<Config, ConfigError> {
        let ctx = Ctx { text, origin };
        let raw: RawConfig = toml::from_str(text).map_err(|e| ConfigError {
            origin: origin.to_string(),
            line: e.span().map(|s| ctx.line_of(s.start)),
            key: String::new(),
            message: e.message().trim().to_string(),
        })?;
        let mut config = ctx.validate(raw, env)?;
        apply_env(&mut config, env)?;
        Ok(config)
    }
}

/// The experiment-level rule keys of one `[[experiment]]` table.
struct RuleKeys<'a> {
    primary: &'a Option<Spanned<String>>,
    guardrails: &'a Option<Spanned<Vec<String>>>,
    srm_p: &'a Option<Spanned<f64>>,
    max_crossover_share: &'a Option<Spanned<f64>>,
    equivalence_probability: &'a Option<Spanned<f64>>,
    max_duration_days: &'a Option<Spanned<f64>>,
    attribution_window_hours: &'a Option<Spanned<f64>>,
    min_duration_days: &'a Option<Spanned<f64>>,
    start: &'a Option<Spanned<String>>,
}

struct Ctx<'a> {
    text: &'a str,
    origin: &'a str,
}

impl Ctx<'_> {
    fn line_of(&self, offset: usize) -> usize {
        let end = offset.min(self.text.len());
        self.text.as_bytes()[..end]
            .iter()
            .filter(|&&b| b == b'\n')
            .count()
            + 1
    }

    fn err(
        &self,
        span: Range<usize>,
        key: impl Into<String>,
        message: impl Into<String>,
    ) -> ConfigError {
        ConfigError {
            origin: self.origin.to_string(),
            line: Some(self.line_of(span.start)),
            key: key.into(),
            message: message.into(),
        }
    }

    fn validate(&self, raw: RawConfig, env: &[(String, String)]) -> Result<Config, ConfigError> {
        let addr = match raw.http.addr {
            None => DEFAULT_HTTP_ADDR.parse().expect("default address parses"),
            Some(a) => a.get_ref().parse().map_err(|_| {
                self.err(
                    a.span(),
                    "http.addr",
                    format!(
                        "expected IP:PORT such as 127.0.0.1:8080, got {:?}",
                        a.get_ref()
                    ),
                )
            })?,
        };
        let max_body_bytes = match raw.http.max_body_bytes {
            None => DEFAULT_MAX_BODY_BYTES,
            Some(v) => self.positive_size(&v, "http.max_body_bytes")?,
        };
        let mut tokens = Vec::new();
        if let Some(path) = &raw.http.token_file {
            let text = std::fs::read_to_string(path.get_ref()).map_err(|e| {
                self.err(
                    path.span(),
                    "http.token_file",
                    format!("cannot read {:?}: {e}", path.get_ref()),
                )
            })?;
            // One token per line; blank lines and `#` comments are skipped.
            for t in text.lines().map(str::trim) {
                if t.is_empty() || t.starts_with('#') {
                    continue;
                }
                if let Some(m) = check_token(t) {
                    return Err(self.err(
                        path.span(),
                        "http.token_file",
                        format!("{m} (the token itself is not shown)"),
                    ));
                }
                tokens.push(t.to_string());
            }
            if tokens.is_empty() {
                return Err(self.err(path.span(), "http.token_file", "holds no token"));
            }
        }
        let protect_reads = raw
            .http
            .protect_reads
            .as_ref()
            .is_some_and(|p| *p.get_ref());
        if let Some(p) = raw.http.protect_reads.as_ref().filter(|p| *p.get_ref()) {
            let env_tokens = env
                .iter()
                .any(|(k, v)| k == "POSTERIORD_API_TOKENS" && !v.trim().is_empty());
            if tokens.is_empty() && !env_tokens {
                return Err(self.err(
                    p.span(),
                    "http.protect_reads",
                    "protecting reads needs at least one token (http.token_file or POSTERIORD_API_TOKENS)",
                ));
            }
        }
        let request_timeout = match &raw.http.request_timeout_secs {
            None => std::time::Duration::from_secs(DEFAULT_REQUEST_TIMEOUT_SECS),
            Some(v) => match u64::try_from(*v.get_ref()) {
                Ok(n) if (1..=3600).contains(&n) => std::time::Duration::from_secs(n),
                _ => {
                    return Err(self.err(
                        v.span(),
                        "http.request_timeout_secs",
                        "must be between 1 and 3600 seconds",
                    ))
                }
            },
        };
        // Where a missing list of topics is reported: at `topics` if given (empty), else at
        // the section.
        let kafka_span = raw.kafka.as_ref().map(|k| {
            k.get_ref()
                .topics
                .as_ref()
                .map_or_else(|| k.span(), |t| t.span())
        });
        let kafka = raw.kafka.map(|k| self.kafka(k)).transpose()?;
        let snapshot_interval = match &raw.store.snapshot_interval_ms {
            None => std::time::Duration::from_millis(DEFAULT_SNAPSHOT_INTERVAL_MS),
            Some(v) => match u64::try_from(*v.get_ref()) {
                Ok(ms) if (100..=3_600_000).contains(&ms) => std::time::Duration::from_millis(ms),
                _ => {
                    return Err(self.err(
                        v.span(),
                        "store.snapshot_interval_ms",
                        "must be between 100 and 3600000 milliseconds",
                    ))
                }
            },
        };
        let store = StoreConfig {
            snapshot_interval,
            dir: match raw.store.dir {
                None => PathBuf::from(DEFAULT_STORE_DIR),
                Some(d) if d.get_ref().trim().is_empty() => {
                    return Err(self.err(d.span(), "store.dir", "must not be empty"))
                }
                Some(d) => PathBuf::from(d.into_inner()),
            },
        };
        let mut experiments: Vec<ExperimentDef> = Vec::new();
        for (i, e) in raw.experiment.into_iter().enumerate() {
            let span = e.span();
            let def = self.experiment(i, e.into_inner())?;
            if experiments.iter().any(|x| x.id == def.id) {
                return Err(self.err(
                    span,
                    format!("experiment[{i}].id"),
                    format!("experiment id `{}` is used twice", def.id),
                ));
            }
            experiments.push(def);
        }
        let raw_source_spans: Vec<Range<usize>> = raw
            .source
            .iter()
            .map(|s| {
                s.get_ref()
                    .topics
                    .as_ref()
                    .map_or_else(|| s.span(), |t| t.span())
            })
            .collect();
        let mut sources: Vec<SourceConfig> = Vec::new();
        for (i, s) in raw.source.into_iter().enumerate() {
            let span = s.span();
            let source = self.source(i, span.clone(), s.into_inner())?;
            if sources
                .iter()
                .any(|x| x.mapping.name == source.mapping.name)
            {
                return Err(self.err(
                    span,
                    format!("source[{i}].name"),
                    format!("source name `{}` is used twice", source.mapping.name),
                ));
            }
            sources.push(source);
        }
        self.check_source_topics(&raw_source_spans, kafka.as_ref(), kafka_span, &sources)?;
        let secs = |v: &Option<Spanned<i64>>,
                    key: &str,
                    default: u64|
         -> Result<std::time::Duration, ConfigError> {
            match v {
                None => Ok(std::time::Duration::from_secs(default)),
                Some(x) => match u64::try_from(*x.get_ref()) {
                    Ok(n) if (1..=86_400 * 30).contains(&n) => {
                        Ok(std::time::Duration::from_secs(n))
                    }
                    _ => Err(self.err(x.span(), key, "must be between 1 and 2592000 seconds")),
                },
            }
        };
        let mut webhooks = Vec::new();
        for (i, w) in raw.alerts.webhook.iter().enumerate() {
            let w = w.get_ref();
            let url = w.url.get_ref();
            if !(url.starts_with("http://") || url.starts_with("https://")) {
                return Err(self.err(
                    w.url.span(),
                    format!("alerts.webhook[{i}].url"),
                    "must be an http:// or https:// URL",
                ));
            }
            let var = w.secret_env.get_ref();
            let secret = env.iter().find(|(k, _)| k == var).map(|(_, v)| v.clone());
            let secret = match secret {
                Some(s) if !s.is_empty() => webhook_key(&s).map_err(|why| {
                    self.err(
                        w.secret_env.span(),
                        format!("alerts.webhook[{i}].secret_env"),
                        format!("the environment variable {var} {why}"),
                    )
                })?,
                _ => {
                    return Err(self.err(
                        w.secret_env.span(),
                        format!("alerts.webhook[{i}].secret_env"),
                        format!("the environment variable {var} (the webhook's signing secret) is not set or empty"),
                    ))
                }
            };
            webhooks.push(WebhookConfig {
                url: url.clone(),
                secret_env: var.clone(),
                secret,
            });
        }
        let kafka_topic = match &raw.alerts.kafka {
            None => None,
            Some(k) => {
                let t = &k.get_ref().topic;
                if t.get_ref().trim().is_empty() {
                    return Err(self.err(t.span(), "alerts.kafka.topic", "must not be empty"));
                }
                if kafka.is_none() {
                    return Err(self.err(
                        k.span(),
                        "alerts.kafka",
                        "needs a [kafka] section for the brokers",
                    ));
                }
                Some(t.get_ref().clone())
            }
        };
        let alerts = AlertsConfig {
            hold_down: secs(
                &raw.alerts.hold_down_secs,
                "alerts.hold_down_secs",
                DEFAULT_HOLD_DOWN_SECS,
            )?,
            evaluate_every: secs(
                &raw.alerts.evaluate_every_secs,
                "alerts.evaluate_every_secs",
                DEFAULT_EVALUATE_EVERY_SECS,
            )?,
            evaluate_every_events: match &raw.alerts.evaluate_every_events {
                None => DEFAULT_EVALUATE_EVERY_EVENTS,
                Some(v) => match u64::try_from(*v.get_ref()) {
                    Ok(n) if n >= 100 => n,
                    _ => {
                        return Err(self.err(
                            v.span(),
                            "alerts.evaluate_every_events",
                            "must be at least 100 (rules are never evaluated per event)",
                        ))
                    }
                },
            },
            webhooks,
            kafka_topic,
        };
        let shutdown_grace = secs(
            &raw.shutdown.grace_secs,
            "shutdown.grace_secs",
            DEFAULT_SHUTDOWN_GRACE_SECS,
        )?;
        let history_arm_points = match &raw.history.arm_points {
            None => DEFAULT_HISTORY_ARM_POINTS,
            Some(v) => match usize::try_from(*v.get_ref()) {
                Ok(n) if (64..=1 << 24).contains(&n) => n,
                _ => {
                    return Err(self.err(
                        v.span(),
                        "history.arm_points",
                        "must be between 64 and 16777216 (arm-points kept per experiment; about 112 bytes each)",
                    ))
                }
            },
        };
        Ok(Config {
            http: HttpConfig {
                addr,
                max_body_bytes,
                tokens: ApiTokens(tokens),
                protect_reads,
                request_timeout,
            },
            kafka,
            store,
            experiments,
            alerts,
            shutdown_grace,
            history_arm_points,
            sources,
            event_time: self.event_time(&raw.event_time)?,
        })
    }

    /// Topics of `[[source]]`s are read from `[kafka]`'s brokers, each by one source, none
    /// also in the built-in format or used for dead letters or the changelog; `[kafka]` needs
    /// topics of one kind or the other.
    fn check_source_topics(
        &self,
        spans: &[Range<usize>],
        kafka: Option<&KafkaConfig>,
        kafka_span: Option<Range<usize>>,
        sources: &[SourceConfig],
    ) -> Result<(), ConfigError> {
        let mut seen: Vec<&str> = Vec::new();
        for (i, s) in sources.iter().enumerate() {
            let key = format!("source[{i}].topics");
            if s.topics.is_empty() {
                continue;
            }
            let Some(k) = kafka else {
                return Err(self.err(
                    spans[i].clone(),
                    key,
                    "topics are read from the brokers of a [kafka] section, and there is none",
                ));
            };
            for t in &s.topics {
                let clash = if k.topics.contains(t) {
                    Some("is also in kafka.topics (read in the built-in format)")
                } else if seen.contains(&t.as_str()) {
                    Some("is listed by another [[source]]; a topic reads under one mapping")
                } else if k.dead_letter_topic.as_ref() == Some(t) || k.changelog_topic == *t {
                    Some("is the dead-letter or changelog topic")
                } else {
                    None
                };
                if let Some(why) = clash {
                    return Err(self.err(spans[i].clone(), key, format!("topic `{t}` {why}")));
                }
                seen.push(t);
            }
        }
        if let (Some(k), Some(span)) = (kafka, kafka_span) {
            if k.topics.is_empty() && seen.is_empty() {
                return Err(self.err(
                    span,
                    "kafka.topics",
                    "is required in [kafka], e.g. topics = [\"exp-events\"] (or list a [[source]]'s topics)",
                ));
            }
        }
        Ok(())
    }

    /// `[event_time]` and its per-source tables.
    fn event_time(&self, raw: &raw::RawEventTime) -> Result<EventTimeConfig, ConfigError> {
        let base = self.time_bounds(
            "event_time",
            &raw::RawTimeBounds {
                max_ahead_secs: raw.max_ahead_secs.clone(),
                max_behind_days: raw.max_behind_days.clone(),
                on_skew: raw.on_skew.clone(),
            },
            crate::state::skew::TimeBounds::default(),
        )?;
        let source = |name: &str, t: &Option<raw::RawTimeBounds>| match t {
            None => Ok(base),
            Some(t) => self.time_bounds(&format!("event_time.{name}"), t, base),
        };
        Ok(EventTimeConfig {
            http: source("http", &raw.http)?,
            kafka: source("kafka", &raw.kafka)?,
        })
    }

    fn time_bounds(
        &self,
        key: &str,
        raw: &raw::RawTimeBounds,
        base: crate::state::skew::TimeBounds,
    ) -> Result<crate::state::skew::TimeBounds, ConfigError> {
        use crate::state::skew::OnSkew;
        let mut b = base;
        if let Some(v) = &raw.max_ahead_secs {
            match *v.get_ref() {
                n @ 1..=86_400 => b.max_ahead = n * 1_000_000,
                _ => {
                    return Err(self.err(
                        v.span(),
                        format!("{key}.max_ahead_secs"),
                        "must be between 1 and 86400 seconds (how far a sender's clock may run ahead of the reference)",
                    ))
                }
            }
        }
        if let Some(v) = &raw.max_behind_days {
            let d = *v.get_ref();
            if d.is_finite() && d > 0.0 && d <= 3650.0 {
                b.max_behind = (d * 86_400.0 * 1e6) as i64;
            } else {
                return Err(self.err(
                    v.span(),
                    format!("{key}.max_behind_days"),
                    format!("must be a positive number of days (at most 3650), got {d}"),
                ));
            }
        }
        if let Some(v) = &raw.on_skew {
            b.on_skew = match v.get_ref().as_str() {
                "refuse" => OnSkew::Refuse,
                "clamp" => OnSkew::Clamp,
                other => {
                    return Err(self.err(
                        v.span(),
                        format!("{key}.on_skew"),
                        format!("must be \"refuse\" or \"clamp\", got {other:?}"),
                    ))
                }
            };
        }
        Ok(b)
    }

    fn positive_size(&self, v: &Spanned<i64>, key: &str) -> Result<usize, ConfigError> {
        match usize::try_from(*v.get_ref()) {
            Ok(n) if n > 0 => Ok(n),
            _ => Err(self.err(v.span(), key, "must be a positive number of bytes")),
        }
    }

    fn kafka(&self, k: Spanned<raw::RawKafka>) -> Result<KafkaConfig, ConfigError> {
        let span = k.span();
        let k = k.into_inner();
        let brokers = match k.brokers {
            Some(b) if !b.get_ref().trim().is_empty() => b.into_inner(),
            Some(b) => return Err(self.err(b.span(), "kafka.brokers", "must not be empty")),
            None => {
                return Err(self.err(
                    span,
                    "kafka.brokers",
                    "is required in [kafka], e.g. brokers = \"127.0.0.1:9092\"",
                ))
            }
        };
        // Empty only when `[[source]]`s list the topics (checked once they are read).
        let topics = match k.topics {
            None => Vec::new(),
            Some(t) => {
                let tspan = t.span();
                let list: Vec<String> =
                    t.into_inner().into_iter().map(|s| s.into_inner()).collect();
                if list.iter().any(|s| s.trim().is_empty()) {
                    return Err(self.err(
                        tspan,
                        "kafka.topics",
                        "must list at least one non-empty topic",
                    ));
                }
                list
            }
        };
        let group = match k.group {
            None => DEFAULT_KAFKA_GROUP.to_string(),
            Some(g) if g.get_ref().trim().is_empty() => {
                return Err(self.err(g.span(), "kafka.group", "must not be empty"))
            }
            Some(g) => g.into_inner(),
        };
        let max_event_bytes = match k.max_event_bytes {
            None => DEFAULT_MAX_EVENT_BYTES,
            Some(v) => self.positive_size(&v, "kafka.max_event_bytes")?,
        };
        let dead_letter_topic = match k.dead_letter_topic {
            None => None,
            Some(t) if t.get_ref().trim().is_empty() => {
                return Err(self.err(t.span(), "kafka.dead_letter_topic", "must not be empty"))
            }
            Some(t) if topics.contains(t.get_ref()) => {
                return Err(self.err(
                    t.span(),
                    "kafka.dead_letter_topic",
                    "must differ from the consumed topics",
                ))
            }
            Some(t) => Some(t.into_inner()),
        };
        let changelog_topic = match k.changelog_topic {
            None => format!("{group}-changelog"),
            Some(t) if t.get_ref().trim().is_empty() || topics.contains(t.get_ref()) => {
                return Err(self.err(
                    t.span(),
                    "kafka.changelog_topic",
                    "must be a non-empty topic other than the consumed ones",
                ))
            }
            Some(t) => t.into_inner(),
        };
        let changelog_interval = match &k.changelog_interval_ms {
            None => std::time::Duration::from_millis(DEFAULT_CHANGELOG_INTERVAL_MS),
            Some(v) => match u64::try_from(*v.get_ref()) {
                Ok(ms) if (100..=3_600_000).contains(&ms) => std::time::Duration::from_millis(ms),
                _ => {
                    return Err(self.err(
                        v.span(),
                        "kafka.changelog_interval_ms",
                        "must be between 100 and 3600000 milliseconds",
                    ))
                }
            },
        };
        let outcome_lateness = match &k.outcome_lateness_secs {
            None => std::time::Duration::from_secs(DEFAULT_OUTCOME_LATENESS_SECS),
            Some(v) => match u64::try_from(*v.get_ref()) {
                Ok(s) if s <= 7 * 86_400 => std::time::Duration::from_secs(s),
                _ => {
                    return Err(self.err(
                        v.span(),
                        "kafka.outcome_lateness_secs",
                        "must be between 0 and 604800 seconds",
                    ))
                }
            },
        };
        let idle_allowance = match &k.idle_allowance_secs {
            None => std::time::Duration::from_secs(DEFAULT_IDLE_ALLOWANCE_SECS),
            Some(v) => match u64::try_from(*v.get_ref()) {
                Ok(s) if s <= 86_400 => std::time::Duration::from_secs(s),
                _ => {
                    return Err(self.err(
                        v.span(),
                        "kafka.idle_allowance_secs",
                        "must be between 0 and 86400 seconds",
                    ))
                }
            },
        };
        let mut properties = BTreeMap::new();
        for (name, value) in k.properties {
            let text = match value.into_inner() {
                PropertyValue::Text(s) => s,
                PropertyValue::Integer(i) => i.to_string(),
                PropertyValue::Bool(b) => b.to_string(),
                PropertyValue::Float(f) => f.to_string(),
            };
            properties.insert(name, text);
        }
        Ok(KafkaConfig {
            brokers,
            topics,
            group,
            max_event_bytes,
            dead_letter_topic,
            changelog_topic,
            changelog_interval,
            outcome_lateness,
            idle_allowance,
            properties,
        })
    }

    fn name(&self, s: &Spanned<String>, key: &str) -> Result<String, ConfigError> {
        check_name(s.get_ref()).map_err(|m| self.err(s.span(), key, m))?;
        Ok(s.get_ref().clone())
    }

    fn experiment(&self, i: usize, e: RawExperiment) -> Result<ExperimentDef, ConfigError> {
        let key = format!("experiment[{i}]");
        let id = self.name(&e.id, &format!("{key}.id"))?;
        let vspan = e.variants.span();
        let raw_variants = e.variants.into_inner();
        if raw_variants.len() < 2 || raw_variants.len() > MAX_VARIANTS {
            return Err(self.err(
                vspan,
                format!("{key}.variants"),
                format!(
                    "needs 2 to {MAX_VARIANTS} variants, got {}",
                    raw_variants.len()
                ),
            ));
        }
        let n = raw_variants.len();
        let mut variants: Vec<VariantDef> = Vec::with_capacity(n);
        let mut any_weight = false;
        for (j, v) in raw_variants.iter().enumerate() {
            let v = v.get_ref();
            let name = self.name(&v.name, &format!("{key}.variants[{j}].name"))?;
            if variants.iter().any(|x| x.name == name) {
                return Err(self.err(
                    v.name.span(),
                    format!("{key}.variants[{j}].name"),
                    format!("variant `{name}` is listed twice"),
                ));
            }
            let weight = match &v.weight {
                None => f64::NAN,
                Some(w) => {
                    any_weight = true;
                    let x = *w.get_ref();
                    if !(x.is_finite() && x > 0.0) {
                        return Err(self.err(
                            w.span(),
                            format!("{key}.variants[{j}].weight"),
                            format!("must be a positive number, got {x}"),
                        ));
                    }
                    x
                }
            };
            variants.push(VariantDef { name, weight });
        }
        if any_weight {
            if let Some(j) = variants.iter().position(|v| v.weight.is_nan()) {
                return Err(self.err(
                    raw_variants[j].span(),
                    format!("{key}.variants[{j}].weight"),
                    "give every variant a weight, or none (equal split)",
                ));
            }
            let sum: f64 = variants.iter().map(|v| v.weight).sum();
            if (sum - 1.0).abs() > 1e-3 {
                return Err(self.err(
                    vspan,
                    format!("{key}.variants"),
                    format!("weights must sum to 1, they sum to {sum}"),
                ));
            }
            for v in &mut variants {
                v.weight /= sum;
            }
        } else {
            for v in &mut variants {
                v.weight = 1.0 / n as f64;
            }
        }
        let control = match &e.control {
            None => 0,
            Some(c) => variants
                .iter()
                .position(|v| &v.name == c.get_ref())
                .ok_or_else(|| {
                    self.err(
                        c.span(),
                        format!("{key}.control"),
                        format!(
                            "`{}` is not one of the variants ({})",
                            c.get_ref(),
                            variants
                                .iter()
                                .map(|v| v.name.as_str())
                                .collect::<Vec<_>>()
                                .join(", ")
                        ),
                    )
                })?,
        };
        if e.metric.is_empty() {
            return Err(self.err(
                e.id.span(),
                format!("{key}.metric"),
                "an experiment needs at least one [[experiment.metric]]",
            ));
        }
        if e.metric.len() > MAX_METRICS {
            return Err(self.err(
                e.metric[MAX_METRICS].span(),
                format!("{key}.metric"),
                format!("at most {MAX_METRICS} metrics per experiment"),
            ));
        }
        let mut metrics: Vec<MetricDef> = Vec::new();
        for (j, m) in e.metric.iter().enumerate() {
            let def = self.metric(&format!("{key}.metric[{j}]"), m.get_ref(), &variants)?;
            if metrics.iter().any(|x| x.name == def.name) {
                return Err(self.err(
                    m.get_ref().name.span(),
                    format!("{key}.metric[{j}].name"),
                    format!("metric `{}` is listed twice", def.name),
                ));
            }
            metrics.push(def);
        }
        let n_conversion = metrics
            .iter()
            .filter(|m| m.kind == MetricKind::Conversion)
            .count();
        if n_conversion > MAX_CONVERSION_METRICS {
            return Err(self.err(
                e.id.span(),
                format!("{key}.metric"),
                format!("at most {MAX_CONVERSION_METRICS} conversion metrics per experiment, got {n_conversion}"),
            ));
        }
        let rules = self.experiment_rules(
            &key,
            RuleKeys {
                primary: &e.primary,
                guardrails: &e.guardrails,
                srm_p: &e.srm_p,
                max_crossover_share: &e.max_crossover_share,
                equivalence_probability: &e.equivalence_probability,
                max_duration_days: &e.max_duration_days,
                attribution_window_hours: &e.attribution_window_hours,
                min_duration_days: &e.min_duration_days,
                start: &e.start,
            },
            &metrics,
        )?;
        Ok(ExperimentDef {
            id,
            generation: 0,
            control,
            variants,
            metrics,
            rules,
        })
    }

    fn source(
        &self,
        i: usize,
        span: Range<usize>,
        s: raw::RawSource,
    ) -> Result<SourceConfig, ConfigError> {
        use crate::mapping::{Field, FieldSource, Mapping, TimeFormat};
        let key = format!("source[{i}]");
        let name = s.name.get_ref().trim().to_string();
        if name.is_empty() || name.len() > 100 {
            return Err(self.err(
                s.name.span(),
                format!("{key}.name"),
                "must be 1 to 100 characters",
            ));
        }
        for (k, v) in &s.constants {
            if !["event", "experiment", "variant"].contains(&k.as_str()) {
                return Err(self.err(
                    v.span(),
                    format!("{key}.constants.{k}"),
                    "only `event`, `experiment` and `variant` may be constants",
                ));
            }
        }
        let paths = [
            &s.unit,
            &s.time,
            &s.event,
            &s.experiment,
            &s.variant,
            &s.count,
            &s.exposure,
            &s.id,
        ];
        let mut fields = Vec::new();
        let mut spans = Vec::new();
        for ((k, _), path) in Field::ALL.iter().zip(paths) {
            let constant = s.constants.get(*k);
            fields.push(match (path, constant) {
                (Some(p), Some(_)) => {
                    return Err(self.err(
                        p.span(),
                        format!("{key}.{k}"),
                        format!("is both a path and `constants.{k}`; keep one"),
                    ))
                }
                (Some(p), None) => FieldSource::Path(p.get_ref().clone()),
                (None, Some(c)) => FieldSource::Constant(c.get_ref().clone()),
                (None, None) => FieldSource::Absent,
            });
            spans.push(
                path.as_ref()
                    .map(|p| p.span())
                    .or_else(|| constant.map(|c| c.span())),
            );
        }
        let time_format = match &s.time_format {
            None => TimeFormat::Rfc3339,
            Some(f) => TimeFormat::ALL
                .iter()
                .find(|(n, _)| n == f.get_ref())
                .map(|(_, t)| *t)
                .ok_or_else(|| {
                    self.err(
                        f.span(),
                        format!("{key}.time_format"),
                        format!(
                            "`{}` is not a time format; use rfc3339, epoch_seconds, epoch_millis or epoch_micros",
                            f.get_ref()
                        ),
                    )
                })?,
        };
        let exposures = s
            .exposures
            .as_ref()
            .map(|e| e.get_ref().clone())
            .unwrap_or_default();
        let mut metrics = Vec::new();
        for (event, metric) in &s.metrics {
            if metric.get_ref().trim().is_empty() {
                return Err(self.err(
                    metric.span(),
                    format!("{key}.metrics.{event}"),
                    "must name a metric",
                ));
            }
            metrics.push((event.clone(), metric.get_ref().clone()));
        }
        let mapping =
            Mapping::new(&name, fields, time_format, exposures, metrics).map_err(|e| {
                let at = Field::ALL
                    .iter()
                    .position(|(k, _)| *k == e.key)
                    .and_then(|f| spans[f].clone())
                    .or_else(|| match e.key.as_str() {
                        "exposures" => s.exposures.as_ref().map(|x| x.span()),
                        _ => None,
                    })
                    .unwrap_or_else(|| span.clone());
                self.err(at, format!("{key}.{}", e.key), e.message)
            })?;
        let mut topics = Vec::new();
        if let Some(t) = &s.topics {
            for topic in t.get_ref() {
                if topic.get_ref().trim().is_empty() {
                    return Err(self.err(
                        topic.span(),
                        format!("{key}.topics"),
                        "a topic name must not be empty",
                    ));
                }
                topics.push(topic.get_ref().clone());
            }
        }
        Ok(SourceConfig { mapping, topics })
    }

    fn experiment_rules(
        &self,
        key: &str,
        e: RuleKeys<'_>,
        metrics: &[MetricDef],
    ) -> Result<ExperimentRules, ConfigError> {
        let find = |name: &str| metrics.iter().position(|m| m.name == name);
        let primary = match e.primary {
            Some(p) => find(p.get_ref()).ok_or_else(|| {
                self.err(
                    p.span(),
                    format!("{key}.primary"),
                    format!("`{}` is not one of the experiment's metrics", p.get_ref()),
                )
            })?,
            None => metrics
                .iter()
                .position(|m| m.kind == MetricKind::Conversion)
                .unwrap_or(0),
        };
        let guardrails = match e.guardrails {
            Some(g) => {
                let mut out = Vec::new();
                for name in g.get_ref() {
                    let idx = find(name).ok_or_else(|| {
                        self.err(
                            g.span(),
                            format!("{key}.guardrails"),
                            format!("`{name}` is not one of the experiment's metrics"),
                        )
                    })?;
                    if idx == primary {
                        return Err(self.err(
                            g.span(),
                            format!("{key}.guardrails"),
                            format!("`{name}` is the primary metric"),
                        ));
                    }
                    out.push(idx);
                }
                out
            }
            None => (0..metrics.len()).filter(|&i| i != primary).collect(),
        };
        let within = |v: &Option<Spanned<f64>>, k: &str, default: f64, lo: f64, hi: f64| match v {
            None => Ok(default),
            Some(x) if x.get_ref().is_finite() && *x.get_ref() > lo && *x.get_ref() < hi => {
                Ok(*x.get_ref())
            }
            Some(x) => Err(self.err(
                x.span(),
                format!("{key}.{k}"),
                format!(
                    "must be between {lo} and {hi} (exclusive), got {}",
                    x.get_ref()
                ),
            )),
        };
        let max_duration = match e.max_duration_days {
            None => None,
            Some(d) if d.get_ref().is_finite() && *d.get_ref() > 0.0 && *d.get_ref() <= 3650.0 => {
                Some((*d.get_ref() * 86_400.0 * 1e6) as i64)
            }
            Some(d) => {
                return Err(self.err(
                    d.span(),
                    format!("{key}.max_duration_days"),
                    format!(
                        "must be a positive number of days (at most 3650), got {}",
                        d.get_ref()
                    ),
                ))
            }
        };
        let attribution_window = match e.attribution_window_hours {
            None => None,
            Some(h)
                if h.get_ref().is_finite() && *h.get_ref() > 0.0 && *h.get_ref() <= 87_600.0 =>
            {
                Some((*h.get_ref() * 3_600.0 * 1e6) as i64)
            }
            Some(h) => {
                return Err(self.err(
                    h.span(),
                    format!("{key}.attribution_window_hours"),
                    format!(
                        "must be a positive number of hours (at most 87600), got {}",
                        h.get_ref()
                    ),
                ))
            }
        };
        let min_duration = match e.min_duration_days {
            None => DEFAULT_MIN_DURATION,
            Some(d) if d.get_ref().is_finite() && *d.get_ref() >= 0.0 && *d.get_ref() <= 3650.0 => {
                (*d.get_ref() * 86_400.0 * 1e6) as i64
            }
            Some(d) => {
                return Err(self.err(
                    d.span(),
                    format!("{key}.min_duration_days"),
                    format!("must be a number of days in [0, 3650], got {}", d.get_ref()),
                ))
            }
        };
        let start = match e.start {
            None => None,
            Some(s) => Some(crate::decode::parse_time(s.get_ref()).map_err(|r| {
                self.err(
                    s.span(),
                    format!("{key}.start"),
                    format!(
                        "must be an RFC 3339 time such as 2026-03-02T00:00:00Z ({})",
                        r.message
                    ),
                )
            })?),
        };
        if let (Some(max), Some(d)) = (max_duration, e.min_duration_days) {
            if max < min_duration {
                return Err(self.err(
                    d.span(),
                    format!("{key}.min_duration_days"),
                    "is longer than max_duration_days, so no ship or equivalence decision could ever be made",
                ));
            }
        }
        Ok(ExperimentRules {
            min_duration,
            primary,
            guardrails,
            srm_p: within(e.srm_p, "srm_p", DEFAULT_SRM_P, 0.0, 0.5)?,
            max_crossover_share: within(
                e.max_crossover_share,
                "max_crossover_share",
                DEFAULT_MAX_CROSSOVER_SHARE,
                0.0,
                1.0,
            )?,
            equivalence_probability: within(
                e.equivalence_probability,
                "equivalence_probability",
                DEFAULT_EQUIVALENCE_PROBABILITY,
                0.5,
                1.0,
            )?,
            max_duration,
            attribution_window,
            start,
        })
    }

    fn metric_rules(
        &self,
        key: &str,
        r: Option<&Spanned<raw::RawRules>>,
        kind: MetricKind,
    ) -> Result<MetricRules, ConfigError> {
        let mut rules = MetricRules::default();
        if kind == MetricKind::DefectRate(ExposureBasis::Reported) {
            // Such a metric's events may carry no units at all (defects per machine hour):
            // its own minimum is `min_exposure`, so the unit minimum is off unless set.
            rules.min_units = 0;
        }
        let Some(r) = r else { return Ok(rules) };
        let r = r.get_ref();
        if let Some(v) = &r.min_units {
            rules.min_units = u64::try_from(*v.get_ref()).map_err(|_| {
                self.err(v.span(), format!("{key}.min_units"), "must not be negative")
            })?;
        }
        if let Some(v) = &r.min_exposure {
            let x = *v.get_ref();
            if !(x.is_finite() && x >= 0.0) {
                return Err(self.err(
                    v.span(),
                    format!("{key}.min_exposure"),
                    "must be a non-negative number",
                ));
            }
            rules.min_exposure = x;
        }
        if let Some(h) = &r.harm {
            let probability = h.get_ref().probability.unwrap_or(DEFAULT_HARM_PROBABILITY);
            let margin = h.get_ref().margin.unwrap_or(0.0);
            if !(probability > 0.5 && probability < 1.0) {
                return Err(self.err(
                    h.span(),
                    format!("{key}.harm.probability"),
                    format!("must be between 0.5 and 1 (exclusive), got {probability}"),
                ));
            }
            if !(margin.is_finite() && (0.0..1.0).contains(&margin)) {
                return Err(self.err(
                    h.span(),
                    format!("{key}.harm.margin"),
                    format!(
                        "must be a relative margin in [0, 1), got {margin}{}",
                        percent_slip(margin)
                    ),
                ));
            }
            rules.harm = Some(HarmRule {
                probability,
                margin,
            });
        }
        if let Some(sh) = &r.ship {
            let t = sh.get_ref().threshold_of_caring;
            if !(t.is_finite() && t > 0.0) {
                return Err(self.err(
                    sh.span(),
                    format!("{key}.ship.threshold_of_caring"),
                    format!("must be a positive number in the metric's rate units, got {t}"),
                ));
            }
            if kind == MetricKind::Conversion && t >= 1.0 {
                return Err(self.err(
                    sh.span(),
                    format!("{key}.ship.threshold_of_caring"),
                    format!(
                        "is a difference of conversion rates, which lies between 0 and 1, got {t}{}",
                        if t < 100.0 {
                            format!(
                                "; did you mean {} ({t} percentage points)?",
                                round_for_hint(t / 100.0)
                            )
                        } else {
                            String::new()
                        }
                    ),
                ));
            }
            rules.ship = Some(ShipRule {
                threshold_of_caring: t,
            });
        }
        if let Some(c) = &r.clear {
            rules.clear = match c.get_ref() {
                raw::RawToggle::Flag(false) => None,
                raw::RawToggle::Flag(true) => MetricRules::default().clear,
                raw::RawToggle::Table(t) => {
                    let margin = t.margin.unwrap_or(DEFAULT_CLEAR_MARGIN);
                    let probability = t.probability.unwrap_or(DEFAULT_CLEAR_PROBABILITY);
                    if !(margin.is_finite() && (0.0..1.0).contains(&margin)) {
                        return Err(self.err(
                            c.span(),
                            format!("{key}.clear.margin"),
                            format!(
                                "must be a relative margin in [0, 1), got {margin}{}",
                                percent_slip(margin)
                            ),
                        ));
                    }
                    if !(probability > 0.0 && probability < 0.5) {
                        return Err(self.err(
                            c.span(),
                            format!("{key}.clear.probability"),
                            format!("must be between 0 and 0.5 (exclusive), got {probability}"),
                        ));
                    }
                    Some(ClearRule {
                        margin,
                        probability,
                    })
                }
            };
        }
        if let Some(c) = &r.harm_evidence {
            rules.evidence = match c.get_ref() {
                raw::RawToggle::Flag(false) => None,
                raw::RawToggle::Flag(true) => MetricRules::default().evidence,
                raw::RawToggle::Table(t) => {
                    let alpha = t.alpha.unwrap_or(DEFAULT_EVIDENCE_ALPHA);
                    let margin = t.margin.unwrap_or(0.0);
                    if !(alpha > 0.0 && alpha < 0.5) {
                        return Err(self.err(
                            c.span(),
                            format!("{key}.harm_evidence.alpha"),
                            format!("must be between 0 and 0.5 (exclusive), got {alpha}"),
                        ));
                    }
                    if !(margin.is_finite() && (0.0..1.0).contains(&margin)) {
                        return Err(self.err(
                            c.span(),
                            format!("{key}.harm_evidence.margin"),
                            format!(
                                "must be a relative margin in [0, 1), got {margin}{}",
                                percent_slip(margin)
                            ),
                        ));
                    }
                    Some(EvidenceRule { alpha, margin })
                }
            };
        }
        if let Some(v) = &r.rope {
            let x = *v.get_ref();
            if !(x.is_finite() && x > 0.0 && x < 1.0) {
                return Err(self.err(
                    v.span(),
                    format!("{key}.rope"),
                    format!(
                        "must be a relative half-width in (0, 1), got {x}{}",
                        percent_slip(x)
                    ),
                ));
            }
            rules.rope = x;
        }
        Ok(rules)
    }

    fn metric(
        &self,
        key: &str,
        m: &RawMetric,
        variants: &[VariantDef],
    ) -> Result<MetricDef, ConfigError> {
        let name = self.name(&m.name, &format!("{key}.name"))?;
        let kind = match (*m.kind.get_ref(), &m.exposure) {
            (RawKind::Conversion, Some(x)) => {
                return Err(self.err(
                    x.span(),
                    format!("{key}.exposure"),
                    "only defect_rate metrics take `exposure`",
                ))
            }
            (RawKind::Conversion, None) => MetricKind::Conversion,
            (RawKind::DefectRate, x) => {
                MetricKind::DefectRate(match x.as_ref().map(|x| *x.get_ref()) {
                    None | Some(RawExposure::Units) => ExposureBasis::Units,
                    Some(RawExposure::Reported) => ExposureBasis::Reported,
                })
            }
        };
        let default_prior = match kind {
            MetricKind::Conversion => Prior::Beta {
                alpha: 1.0,
                beta: 1.0,
            },
            MetricKind::DefectRate(_) => Prior::Gamma {
                shape: 1.0,
                rate: 1.0,
            },
        };
        let prior = match &m.prior {
            None => default_prior,
            Some(p) => self.prior(p, &format!("{key}.prior"), kind)?,
        };
        let mut variant_priors = vec![None; variants.len()];
        for (vname, p) in &m.variant_priors {
            let pkey = format!("{key}.variant_priors.{vname}");
            let Some(idx) = variants.iter().position(|v| &v.name == vname) else {
                return Err(self.err(
                    p.span(),
                    pkey,
                    format!("`{vname}` is not one of the variants"),
                ));
            };
            variant_priors[idx] = Some(self.prior(p, &pkey, kind)?);
        }
        let rules = self.metric_rules(&format!("{key}.rules"), m.rules.as_ref(), kind)?;
        Ok(MetricDef {
            name,
            kind,
            prior,
            variant_priors,
            rules,
        })
    }

    fn prior(
        &self,
        p: &Spanned<RawPrior>,
        key: &str,
        kind: MetricKind,
    ) -> Result<Prior, ConfigError> {
        let r = p.get_ref();
        // The statistics core answers every posterior whose parameters lie in these ranges
        // (docs/methods.md, "Accepted ranges"); a prior outside them is refused here, by
        // name, rather than failing at every evaluation of the experiment.
        let in_range = |x: Option<f64>, field: &str, (min, max): (f64, f64)| {
            match x {
                Some(v) if v.is_finite() && v > 0.0 && (min..=max).contains(&v) => Ok(v),
                Some(v) if v.is_finite() && v > 0.0 => Err(self.err(
                    p.span(),
                    format!("{key}.{field}"),
                    format!("must lie in [{min:e}, {max:e}] (the range the statistics are verified on), got {v:e}"),
                )),
                Some(v) => Err(self.err(
                    p.span(),
                    format!("{key}.{field}"),
                    format!("must be a positive finite number, got {v}"),
                )),
                None => Err(self.err(p.span(), format!("{key}.{field}"), "is required")),
            }
        };
        let shape_range = (crate::stats::MIN_SHAPE, crate::stats::MAX_SHAPE);
        let rate_range = (crate::stats::MIN_RATE, crate::stats::MAX_RATE);
        let positive = |x: Option<f64>, field: &str| in_range(x, field, shape_range);
        match kind {
            MetricKind::Conversion => {
                if r.shape.is_some() || r.rate.is_some() {
                    return Err(self.err(
                        p.span(),
                        key,
                        "a conversion metric takes a Beta prior { alpha, beta }, not shape/rate",
                    ));
                }
                Ok(Prior::Beta {
                    alpha: positive(r.alpha, "alpha")?,
                    beta: positive(r.beta, "beta")?,
                })
            }
            MetricKind::DefectRate(_) => {
                if r.alpha.is_some() || r.beta.is_some() {
                    return Err(self.err(
                        p.span(),
                        key,
                        "a defect_rate metric takes a Gamma prior { shape, rate }, not alpha/beta",
                    ));
                }
                Ok(Prior::Gamma {
                    shape: positive(r.shape, "shape")?,
                    rate: in_range(r.rate, "rate", rate_range)?,
                })
            }
        }
    }
}

/// Names appear in URLs, metric labels and events: keep them short and printable.
fn check_name(name: &str) -> Result<(), String> {
    let ok_char = |c: char| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.');
    if name.is_empty() || name.len() > 128 {
        return Err(format!("must be 1 to 128 characters, got {}", name.len()));
    }
    if !name.chars().all(ok_char) {
        return Err(format!(
            "{name:?} may use only letters, digits, '-', '_' and '.'"
        ));
    }
    Ok(())
}

fn env_err(var: &str, message: impl Into<String>) -> ConfigError {
    ConfigError {
        origin: "<environment>".into(),
        line: None,
        key: var.to_string(),
        message: message.into(),
    }
}

/// Apply `POSTERIORD_*` overrides; documented in the README's configuration section.
fn apply_env(config: &mut Config, env: &[(String, String)]) -> Result<(), ConfigError> {
    let get = |name: &str| env.iter().find(|(k, _)| k == name).map(|(_, v)| v.clone());
    if let Some(v) = get("POSTERIORD_HTTP_ADDR") {
        config.http.addr = v.parse().map_err(|_| {
            env_err(
                "POSTERIORD_HTTP_ADDR",
                format!("expected IP:PORT, got {v:?}"),
            )
        })?;
    }
    if let Some(v) = get("POSTERIORD_API_TOKENS") {
        for t in v.split(',').map(str::trim).filter(|t| !t.is_empty()) {
            if let Some(m) = check_token(t) {
                return Err(env_err(
                    "POSTERIORD_API_TOKENS",
                    format!("{m} (the token itself is not shown)"),
                ));
            }
            config.http.tokens.0.push(t.to_string());
        }
    }
    if config.http.protect_reads && config.http.tokens.0.is_empty() {
        return Err(env_err(
            "http.protect_reads",
            "protecting reads needs at least one token (http.token_file or POSTERIORD_API_TOKENS)",
        ));
    }
    if let Some(v) = get("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS") {
        // For every source: e.g. while a backlog older than the lateness is re-read.
        match v.trim().parse::<f64>() {
            Ok(d) if d.is_finite() && d > 0.0 && d <= 3650.0 => {
                let behind = (d * 86_400.0 * 1e6) as i64;
                config.event_time.http.max_behind = behind;
                config.event_time.kafka.max_behind = behind;
            }
            _ => {
                return Err(env_err(
                    "POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS",
                    format!("must be a positive number of days (at most 3650), got {v:?}"),
                ))
            }
        }
    }
    if let Some(v) = get("POSTERIORD_STORE_DIR") {
        if v.trim().is_empty() {
            return Err(env_err("POSTERIORD_STORE_DIR", "must not be empty"));
        }
        config.store.dir = PathBuf::from(v);
    }
    let brokers = get("POSTERIORD_KAFKA_BROKERS");
    let topics = get("POSTERIORD_KAFKA_TOPICS");
    let group = get("POSTERIORD_KAFKA_GROUP");
    let props: Vec<(String, String)> = env
        .iter()
        .filter_map(|(k, v)| {
            k.strip_prefix("POSTERIORD_KAFKA_PROP_")
                .map(|p| (p.to_ascii_lowercase().replace('_', "."), v.clone()))
        })
        .collect();
    let any_kafka = brokers.is_some() || topics.is_some() || group.is_some() || !props.is_empty();
    if any_kafka && config.kafka.is_none() {
        let (Some(b), Some(_)) = (&brokers, &topics) else {
            return Err(env_err(
                "POSTERIORD_KAFKA_BROKERS",
                "without a [kafka] section, set both POSTERIORD_KAFKA_BROKERS and POSTERIORD_KAFKA_TOPICS",
            ));
        };
        config.kafka = Some(KafkaConfig {
            brokers: b.clone(),
            topics: Vec::new(),
            group: DEFAULT_KAFKA_GROUP.into(),
            max_event_bytes: DEFAULT_MAX_EVENT_BYTES,
            dead_letter_topic: None,
            changelog_topic: format!("{DEFAULT_KAFKA_GROUP}-changelog"),
            changelog_interval: std::time::Duration::from_millis(DEFAULT_CHANGELOG_INTERVAL_MS),
            outcome_lateness: std::time::Duration::from_secs(DEFAULT_OUTCOME_LATENESS_SECS),
            idle_allowance: std::time::Duration::from_secs(DEFAULT_IDLE_ALLOWANCE_SECS),
            properties: BTreeMap::new(),
        });
    }
    if let Some(k) = config.kafka.as_mut() {
        if let Some(b) = brokers {
            if b.trim().is_empty() {
                return Err(env_err("POSTERIORD_KAFKA_BROKERS", "must not be empty"));
            }
            k.brokers = b;
        }
        if let Some(t) = topics {
            let list: Vec<String> = t
                .split(',')
                .map(|s| s.trim().to_string())
                .filter(|s| !s.is_empty())
                .collect();
            if list.is_empty() {
                return Err(env_err(
                    "POSTERIORD_KAFKA_TOPICS",
                    "must list at least one topic, comma-separated",
                ));
            }
            k.topics = list;
        }
        if let Some(g) = group {
            if g.trim().is_empty() {
                return Err(env_err("POSTERIORD_KAFKA_GROUP", "must not be empty"));
            }
            if k.changelog_topic == format!("{}-changelog", k.group) {
                k.changelog_topic = format!("{g}-changelog");
            }
            k.group = g;
        }
        for (name, value) in props {
            k.properties.insert(name, value);
        }
    }
    Ok(())
}

/// The hint for a relative quantity written in percent (`rope = 1` meant as 1%): the likely
/// intended fraction, or nothing when the value does not look like a percentage.
fn percent_slip(x: f64) -> String {
    if x.is_finite() && (1.0..100.0).contains(&x) {
        format!(
            "; did you mean {} ({x}% relative)?",
            round_for_hint(x / 100.0)
        )
    } else {
        String::new()
    }
}

/// `x` without the binary noise of a division (5 / 100 → 0.05, not 0.05000000000000001).
fn round_for_hint(x: f64) -> f64 {
    format!("{x:.10}").parse().unwrap_or(x)
}

/// Prefix of a Standard Webhooks secret: `whsec_` followed by the base64 of the key.
pub const WEBHOOK_SECRET_PREFIX: &str = "whsec_";

/// The signing key a webhook secret stands for. A `whsec_<base64>` value (the Standard
/// Webhooks form, shared with receivers as it is) is decoded; any other value is used as raw
/// bytes, which receivers write as `whsec_` + base64 of those bytes.
pub fn webhook_key(value: &str) -> Result<Vec<u8>, String> {
    use base64::Engine;
    let Some(encoded) = value.strip_prefix(WEBHOOK_SECRET_PREFIX) else {
        return Ok(value.as_bytes().to_vec());
    };
    // Receivers' libraries accept the base64 with or without its `=` padding.
    let key = base64::engine::general_purpose::STANDARD_NO_PAD
        .decode(encoded.trim_end_matches('='))
        .map_err(|e| {
            format!("starts with `{WEBHOOK_SECRET_PREFIX}` but the rest is not base64 ({e})")
        })?;
    if key.is_empty() {
        return Err(format!("holds `{WEBHOOK_SECRET_PREFIX}` with an empty key"));
    }
    Ok(key)
}

#[cfg(test)]
mod tests;
