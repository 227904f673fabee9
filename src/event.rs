//! The event model after decoding: what a source hands to the state, and why an event can be refused.
//!
//! Names are borrowed from the decoded bytes where possible (`Cow`), so the hot path allocates
//! only when a JSON string carries escapes. No serde here: decoding lives in `decode`.

use std::borrow::Cow;
use std::fmt;

/// Microseconds since the Unix epoch, UTC.
pub type Micros = i64;

/// One decoded event, not yet checked against the experiment definitions.
#[derive(Debug, Clone, PartialEq)]
pub struct Event<'a> {
    /// Experiment the event belongs to. Empty only for an [`EventBody::Outcome`] that names no
    /// experiment: it is attributed through the unit's exposures (see [`Event::attributed`]).
    pub experiment: Cow<'a, str>,
    /// Optional producer-chosen id; two events with the same id are applied once.
    pub id: Option<Cow<'a, str>>,
    /// Event time, if the event carried one.
    pub time: Option<Micros>,
    /// What happened.
    pub body: EventBody<'a>,
}

/// The kinds of event posteriord understands.
#[derive(Debug, Clone, PartialEq)]
pub enum EventBody<'a> {
    /// A unit was shown a variant.
    Exposure {
        /// Variant shown.
        variant: Cow<'a, str>,
        /// The experimental unit (user, device, session id).
        unit: Cow<'a, str>,
    },
    /// A unit converted on a conversion metric.
    Conversion {
        /// Conversion metric.
        metric: Cow<'a, str>,
        /// The unit that converted.
        unit: Cow<'a, str>,
    },
    /// Defects observed on a defect-rate metric.
    Defect {
        /// Defect metric.
        metric: Cow<'a, str>,
        /// Whose variant the defects count against.
        target: Target<'a>,
        /// Number of defects (may be 0, e.g. to report clean exposure).
        count: u64,
        /// Exposure reported with the defects (`exposure = "reported"` metrics).
        exposure: Option<f64>,
    },
    /// Something a unit did on a metric, from a stream that need not know any experiment
    /// (a purchase, a crash). With an experiment it counts in that one; without, in every
    /// experiment defining the metric that exposed the unit at or before the event's time.
    /// On a conversion metric it is a conversion; on a defect-rate metric, `count` defects.
    Outcome {
        /// Metric the outcome is for.
        metric: Cow<'a, str>,
        /// The unit it happened to.
        unit: Cow<'a, str>,
        /// Number of defects (defect-rate metrics; 1 when the source maps no count).
        count: u64,
        /// Exposure reported with the defects (`exposure = "reported"` metrics).
        exposure: Option<f64>,
    },
    /// Pre-aggregated increments from an upstream job.
    Tally {
        /// Metric the increments are for.
        metric: Cow<'a, str>,
        /// Variant the increments are for.
        variant: Cow<'a, str>,
        /// The increments.
        amounts: TallyAmounts,
    },
}

impl Event<'_> {
    /// The event with every borrowed name copied (to keep it past its input buffer).
    pub fn into_owned(self) -> Event<'static> {
        fn own(c: Cow<'_, str>) -> Cow<'static, str> {
            Cow::Owned(c.into_owned())
        }
        Event {
            experiment: own(self.experiment),
            id: self.id.map(own),
            time: self.time,
            body: match self.body {
                EventBody::Exposure { variant, unit } => EventBody::Exposure {
                    variant: own(variant),
                    unit: own(unit),
                },
                EventBody::Conversion { metric, unit } => EventBody::Conversion {
                    metric: own(metric),
                    unit: own(unit),
                },
                EventBody::Defect {
                    metric,
                    target,
                    count,
                    exposure,
                } => EventBody::Defect {
                    metric: own(metric),
                    target: match target {
                        Target::Unit(u) => Target::Unit(own(u)),
                        Target::Variant(v) => Target::Variant(own(v)),
                    },
                    count,
                    exposure,
                },
                EventBody::Outcome {
                    metric,
                    unit,
                    count,
                    exposure,
                } => EventBody::Outcome {
                    metric: own(metric),
                    unit: own(unit),
                    count,
                    exposure,
                },
                EventBody::Tally {
                    metric,
                    variant,
                    amounts,
                } => EventBody::Tally {
                    metric: own(metric),
                    variant: own(variant),
                    amounts,
                },
            },
        }
    }

    /// Whether the event names no experiment and is attributed through exposures.
    pub fn attributed(&self) -> bool {
        self.experiment.is_empty() && matches!(self.body, EventBody::Outcome { .. })
    }
}

/// Who a defect event is attributed to.
#[derive(Debug, Clone, PartialEq)]
pub enum Target<'a> {
    /// The variant an exposed unit is in.
    Unit(Cow<'a, str>),
    /// A variant named directly.
    Variant(Cow<'a, str>),
}

/// Increments carried by a tally event.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum TallyAmounts {
    /// For conversion metrics.
    Trials {
        /// Added trials.
        trials: u64,
        /// Added successes (≤ trials).
        successes: u64,
    },
    /// For defect-rate metrics.
    Defects {
        /// Added defects.
        count: u64,
        /// Added exposure, if any.
        exposure: Option<f64>,
    },
}

/// What applying a valid event did. Only `Applied` changes a posterior.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Outcome {
    /// The event changed the state.
    Applied,
    /// An event with the same id was applied before.
    DuplicateId,
    /// The unit was already exposed to this variant.
    DuplicateExposure,
    /// The unit was already exposed to another variant; it stays in its first one.
    Crossover,
    /// A conversion or defect for a unit that was never exposed.
    Orphan,
    /// The unit had already converted on this metric.
    DuplicateConversion,
    /// A mapped event whose name maps to no metric and is no exposure: not for posteriord.
    Ignored,
    /// An outcome naming no experiment, for a unit no experiment defining its metric exposed.
    Unexposed,
    /// An outcome naming no experiment, earlier than the unit's first exposure in every
    /// experiment defining its metric.
    BeforeExposure,
    /// An outcome naming no experiment, later than every such experiment's attribution window.
    OutsideWindow,
    /// An outcome naming no experiment, read from a co-partitioned topic before the assignment
    /// stream of its partition reached its time: kept in the shard's state and decided when
    /// the assignments catch up (or the lateness bound passes), under its final outcome.
    Held,
}

impl Outcome {
    /// Every outcome, in reporting order.
    pub const ALL: [Outcome; 11] = [
        Outcome::Applied,
        Outcome::DuplicateId,
        Outcome::DuplicateExposure,
        Outcome::Crossover,
        Outcome::Orphan,
        Outcome::DuplicateConversion,
        Outcome::Ignored,
        Outcome::Unexposed,
        Outcome::BeforeExposure,
        Outcome::OutsideWindow,
        Outcome::Held,
    ];

    /// The outcomes counted per experiment (a prefix of `ALL`); the others belong to no
    /// experiment and are counted per source only.
    pub const PER_EXPERIMENT: [Outcome; 6] = [
        Outcome::Applied,
        Outcome::DuplicateId,
        Outcome::DuplicateExposure,
        Outcome::Crossover,
        Outcome::Orphan,
        Outcome::DuplicateConversion,
    ];

    /// Stable snake_case name used in metrics labels and API documents.
    pub fn as_str(self) -> &'static str {
        match self {
            Outcome::Applied => "applied",
            Outcome::DuplicateId => "duplicate_id",
            Outcome::DuplicateExposure => "duplicate_exposure",
            Outcome::Crossover => "crossover",
            Outcome::Orphan => "orphan",
            Outcome::DuplicateConversion => "duplicate_conversion",
            Outcome::Ignored => "ignored",
            Outcome::Unexposed => "unexposed",
            Outcome::BeforeExposure => "before_exposure",
            Outcome::OutsideWindow => "outside_window",
            Outcome::Held => "held",
        }
    }
}

/// Why an event was refused. Each reason is counted separately in metrics.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
#[non_exhaustive]
pub enum RejectReason {
    /// Not valid JSON (or not UTF-8).
    InvalidJson,
    /// Valid JSON but not an object.
    NotAnObject,
    /// `type` is missing or not one we know.
    UnknownType,
    /// A required field is absent.
    MissingField,
    /// A field has the wrong JSON type.
    WrongType,
    /// `time` is not RFC 3339.
    BadTime,
    /// A count or exposure is negative.
    NegativeValue,
    /// A tally claims more successes than trials.
    SuccessesExceedTrials,
    /// Fields that cannot go together (e.g. both `unit` and `variant` on a defect).
    ConflictingFields,
    /// The experiment is not configured.
    UnknownExperiment,
    /// The variant is not part of the experiment.
    UnknownVariant,
    /// The metric is not part of the experiment.
    UnknownMetric,
    /// The event's kind does not fit the metric's kind (a conversion for a defect metric, ...).
    MetricKindMismatch,
    /// A `reported`-exposure metric got a defect without `exposure`.
    ExposureRequired,
    /// A `units`-exposure metric got a per-unit defect carrying `exposure`.
    ExposureNotAllowed,
    /// The message is larger than the configured limit.
    TooLarge,
    /// The event's time is further ahead of its reference time (the Kafka record's timestamp,
    /// the HTTP receive time) than the source allows: the sender's clock runs ahead.
    TimeAhead,
    /// The event's time is further behind its reference time than the source's lateness
    /// allows: a wrong clock, or data too old to count.
    TimeBehind,
    /// The event's time is before its experiment's configured start.
    BeforeStart,
}

impl RejectReason {
    /// Every reason, in reporting order (so metrics can be pre-registered at zero).
    pub const ALL: [RejectReason; 19] = [
        RejectReason::InvalidJson,
        RejectReason::NotAnObject,
        RejectReason::UnknownType,
        RejectReason::MissingField,
        RejectReason::WrongType,
        RejectReason::BadTime,
        RejectReason::NegativeValue,
        RejectReason::SuccessesExceedTrials,
        RejectReason::ConflictingFields,
        RejectReason::UnknownExperiment,
        RejectReason::UnknownVariant,
        RejectReason::UnknownMetric,
        RejectReason::MetricKindMismatch,
        RejectReason::ExposureRequired,
        RejectReason::ExposureNotAllowed,
        RejectReason::TooLarge,
        RejectReason::TimeAhead,
        RejectReason::TimeBehind,
        RejectReason::BeforeStart,
    ];

    /// Stable snake_case name used in metrics labels, API errors and dead-letter headers.
    pub fn as_str(self) -> &'static str {
        match self {
            RejectReason::InvalidJson => "invalid_json",
            RejectReason::NotAnObject => "not_an_object",
            RejectReason::UnknownType => "unknown_type",
            RejectReason::MissingField => "missing_field",
            RejectReason::WrongType => "wrong_type",
            RejectReason::BadTime => "bad_time",
            RejectReason::NegativeValue => "negative_value",
            RejectReason::SuccessesExceedTrials => "successes_exceed_trials",
            RejectReason::ConflictingFields => "conflicting_fields",
            RejectReason::UnknownExperiment => "unknown_experiment",
            RejectReason::UnknownVariant => "unknown_variant",
            RejectReason::UnknownMetric => "unknown_metric",
            RejectReason::MetricKindMismatch => "metric_kind_mismatch",
            RejectReason::ExposureRequired => "exposure_required",
            RejectReason::ExposureNotAllowed => "exposure_not_allowed",
            RejectReason::TooLarge => "too_large",
            RejectReason::TimeAhead => "time_ahead",
            RejectReason::TimeBehind => "time_behind",
            RejectReason::BeforeStart => "before_start",
        }
    }
}

/// A refused event: the reason (for counting) and a message for the person who sent it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Reject {
    /// Machine-readable reason.
    pub reason: RejectReason,
    /// Human-readable detail naming the offending field or value.
    pub message: String,
}

impl Reject {
    /// A reject with its message.
    pub fn new(reason: RejectReason, message: impl Into<String>) -> Reject {
        Reject {
            reason,
            message: message.into(),
        }
    }
}

impl fmt::Display for Reject {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.reason.as_str(), self.message)
    }
}

impl std::error::Error for Reject {}
