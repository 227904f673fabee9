//! Field-mapped sources: how a team's own JSON events (an assignment log, a purchase stream)
//! read as posteriord events, by paths into nested objects, constants and an event-name → metric
//! table. The built-in format (`decode::decode_event`) needs no mapping.
//!
//! A line is read in one pass: a serde seed walks the object and keeps only the values the
//! mapping's paths lead to (borrowed where they carry no escapes), skipping everything else
//! unparsed into a tree, so a mapped event costs about what a borrowed struct would.

use std::borrow::Cow;
use std::fmt;

use serde::de::{DeserializeSeed, IgnoredAny, MapAccess, SeqAccess, Visitor};

use crate::decode::parse_time;
use crate::event::{Event, EventBody, Micros, Reject, RejectReason};

/// How a source writes its event times.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TimeFormat {
    /// RFC 3339 text with a `Z` or numeric offset.
    Rfc3339,
    /// Seconds since the Unix epoch, as a number (fractions allowed) or a string of one.
    EpochSeconds,
    /// Milliseconds since the Unix epoch, as a number or a string of one.
    EpochMillis,
    /// Microseconds since the Unix epoch, as a number or a string of one.
    EpochMicros,
}

impl TimeFormat {
    /// Every format with its config name.
    pub const ALL: [(&'static str, TimeFormat); 4] = [
        ("rfc3339", TimeFormat::Rfc3339),
        ("epoch_seconds", TimeFormat::EpochSeconds),
        ("epoch_millis", TimeFormat::EpochMillis),
        ("epoch_micros", TimeFormat::EpochMicros),
    ];

    fn micros_per_unit(self) -> f64 {
        match self {
            TimeFormat::Rfc3339 => 1.0,
            TimeFormat::EpochSeconds => 1e6,
            TimeFormat::EpochMillis => 1e3,
            TimeFormat::EpochMicros => 1.0,
        }
    }
}

/// The fields a mapping can read, in slot order.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Field {
    /// The unit (user, device) the event is about.
    Unit,
    /// The event time.
    Time,
    /// The event's name: an exposure name or a key of the metric table.
    Event,
    /// The experiment (assignment streams; optional on outcomes).
    Experiment,
    /// The variant (assignment streams).
    Variant,
    /// A defect count (defaults to 1).
    Count,
    /// Exposure reported with defects.
    Exposure,
    /// A producer-chosen id for deduplication.
    Id,
}

impl Field {
    /// Every field with its config key.
    pub const ALL: [(&'static str, Field); 8] = [
        ("unit", Field::Unit),
        ("time", Field::Time),
        ("event", Field::Event),
        ("experiment", Field::Experiment),
        ("variant", Field::Variant),
        ("count", Field::Count),
        ("exposure", Field::Exposure),
        ("id", Field::Id),
    ];

    /// The config key of this field.
    pub fn key(self) -> &'static str {
        Field::ALL[self as usize].0
    }
}

/// Where a field's value comes from.
#[derive(Debug, Clone, PartialEq)]
pub enum FieldSource {
    /// Not mapped.
    Absent,
    /// A path of object keys (or array indices) into the event, as written (`user.id`).
    Path(String),
    /// The same value for every event of the source.
    Constant(String),
}

/// One validated mapping. Built by `config` (which names key and line for each mistake) or by
/// [`Mapping::new`].
#[derive(Debug, Clone)]
pub struct Mapping {
    /// The source's name (counts and dead letters are labelled with it).
    pub name: String,
    fields: Vec<FieldSource>,
    time_format: TimeFormat,
    /// Event names that are exposures.
    exposures: Vec<String>,
    /// Event name → metric.
    metrics: Vec<(String, String)>,
    trie: Trie,
}

impl PartialEq for Mapping {
    fn eq(&self, other: &Mapping) -> bool {
        // The trie follows from the fields.
        (
            &self.name,
            &self.fields,
            self.time_format,
            &self.exposures,
            &self.metrics,
        ) == (
            &other.name,
            &other.fields,
            other.time_format,
            &other.exposures,
            &other.metrics,
        )
    }
}

/// Why a mapping cannot be built; `config` turns it into an error with key and line.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("{key}: {message}")]
pub struct MappingError {
    /// The offending key, relative to the source's table.
    pub key: String,
    /// What is wrong.
    pub message: String,
}

fn bad(key: impl Into<String>, message: impl Into<String>) -> MappingError {
    MappingError {
        key: key.into(),
        message: message.into(),
    }
}

/// A path node: children by key, and the field slot a path ends in.
#[derive(Debug, Clone, Default)]
struct Node {
    children: Vec<(String, usize)>,
    slot: Option<usize>,
}

#[derive(Debug, Clone, Default)]
struct Trie(Vec<Node>);

impl Trie {
    fn child(&self, node: usize, key: &str) -> Option<usize> {
        self.0[node]
            .children
            .iter()
            .find(|(k, _)| k == key)
            .map(|(_, n)| *n)
    }
}

impl Mapping {
    /// A mapping from its parts: `fields` indexed like [`Field::ALL`].
    pub fn new(
        name: &str,
        fields: Vec<FieldSource>,
        time_format: TimeFormat,
        exposures: Vec<String>,
        metrics: Vec<(String, String)>,
    ) -> Result<Mapping, MappingError> {
        assert_eq!(fields.len(), Field::ALL.len(), "one source per field");
        let get = |f: Field| &fields[f as usize];
        for f in [Field::Unit, Field::Time] {
            match get(f) {
                FieldSource::Path(_) => {}
                FieldSource::Absent => {
                    return Err(bad(f.key(), "every source needs a path to it"));
                }
                FieldSource::Constant(_) => {
                    return Err(bad(
                        f.key(),
                        "must be a path into the event, not a constant",
                    ));
                }
            }
        }
        if matches!(get(Field::Count), FieldSource::Constant(_))
            || matches!(get(Field::Exposure), FieldSource::Constant(_))
            || matches!(get(Field::Id), FieldSource::Constant(_))
        {
            return Err(bad(
                "constants",
                "only `event`, `experiment` and `variant` may be constants",
            ));
        }
        if *get(Field::Event) == FieldSource::Absent {
            return Err(bad(
                "event",
                "needs a path, or a constant in `constants.event` (a stream of one kind of event)",
            ));
        }
        if exposures.is_empty() && metrics.is_empty() {
            return Err(bad(
                "metrics",
                "the source maps no event to a metric and names no `exposures`: it would ignore everything",
            ));
        }
        if !exposures.is_empty() {
            for f in [Field::Experiment, Field::Variant] {
                if *get(f) == FieldSource::Absent {
                    return Err(bad(
                        f.key(),
                        "a source with `exposures` needs a path or constant for it",
                    ));
                }
            }
        }
        if let Some(name) = exposures
            .iter()
            .find(|e| metrics.iter().any(|(m, _)| m == *e))
        {
            return Err(bad(
                "exposures",
                format!("`{name}` is both an exposure and a key of `metrics`"),
            ));
        }
        let mut trie = Trie(vec![Node::default()]);
        for (slot, source) in fields.iter().enumerate() {
            let FieldSource::Path(path) = source else {
                continue;
            };
            let key = Field::ALL[slot].0;
            if path.is_empty() || path.split('.').any(str::is_empty) {
                return Err(bad(
                    key,
                    format!("`{path}` is not a path: write object keys separated by dots, like `user.id`"),
                ));
            }
            let mut node = 0;
            for part in path.split('.') {
                node = match trie.child(node, part) {
                    Some(n) => n,
                    None => {
                        trie.0.push(Node::default());
                        let n = trie.0.len() - 1;
                        trie.0[node].children.push((part.to_string(), n));
                        n
                    }
                };
            }
            if let Some(other) = trie.0[node].slot {
                return Err(bad(
                    key,
                    format!("`{path}` is also the path of `{}`", Field::ALL[other].0),
                ));
            }
            trie.0[node].slot = Some(slot);
        }
        // A path that runs through another field's value would read an object as that field.
        for n in &trie.0 {
            if let (Some(slot), false) = (n.slot, n.children.is_empty()) {
                return Err(bad(
                    Field::ALL[slot].0,
                    "another field's path runs through this one's value",
                ));
            }
        }
        Ok(Mapping {
            name: name.to_string(),
            fields,
            time_format,
            exposures,
            metrics,
            trie,
        })
    }

    /// The metric an event name maps to.
    pub fn metric_of(&self, event: &str) -> Option<&str> {
        self.metrics
            .iter()
            .find(|(e, _)| e == event)
            .map(|(_, m)| m.as_str())
    }

    /// The path mapped for field `key`, if it is read from the event.
    pub fn path(&self, key: &str) -> Option<&str> {
        let i = Field::ALL.iter().position(|(k, _)| *k == key)?;
        match &self.fields[i] {
            FieldSource::Path(p) => Some(p),
            _ => None,
        }
    }

    /// Whether the source names exposures (an assignment stream, whose event times drive the
    /// watermark of co-partitioned topics).
    pub fn names_exposures(&self) -> bool {
        !self.exposures.is_empty()
    }

    /// Every metric the mapping names.
    pub fn metrics(&self) -> impl Iterator<Item = &str> {
        self.metrics.iter().map(|(_, m)| m.as_str())
    }

    fn source(&self, f: Field) -> &FieldSource {
        &self.fields[f as usize]
    }

    /// What is wrong with a field: for messages, name the path it was looked for at.
    fn describe(&self, f: Field) -> String {
        match self.source(f) {
            FieldSource::Path(p) => format!("`{}` (path `{p}`)", f.key()),
            _ => format!("`{}`", f.key()),
        }
    }

    /// Read one event: `Ok(None)` when its name maps to nothing (counted as ignored).
    pub fn decode<'a>(
        &self,
        bytes: &'a [u8],
        max_bytes: usize,
    ) -> Result<Option<Event<'a>>, Reject> {
        let values = self.extract(bytes, max_bytes)?;
        self.interpret(values)
    }

    /// The raw value of each field in a line (for the sample-reading command), in
    /// [`Field::ALL`] order.
    pub fn extract<'a>(
        &self,
        bytes: &'a [u8],
        max_bytes: usize,
    ) -> Result<Vec<Option<Value<'a>>>, Reject> {
        if bytes.len() > max_bytes {
            return Err(Reject::new(
                RejectReason::TooLarge,
                format!("event is {} bytes; the limit is {max_bytes}", bytes.len()),
            ));
        }
        let first = bytes.iter().find(|b| !b.is_ascii_whitespace());
        if first != Some(&b'{') {
            return Err(match serde_json::from_slice::<IgnoredAny>(bytes) {
                Ok(_) => Reject::new(RejectReason::NotAnObject, "an event must be a JSON object"),
                Err(e) => Reject::new(RejectReason::InvalidJson, format!("not valid JSON: {e}")),
            });
        }
        let mut values: Vec<Option<Value<'a>>> = vec![None; Field::ALL.len()];
        let mut de = serde_json::Deserializer::from_slice(bytes);
        Seed {
            trie: &self.trie,
            node: 0,
            out: &mut values,
        }
        .deserialize(&mut de)
        .and_then(|()| de.end())
        .map_err(|e| Reject::new(RejectReason::InvalidJson, format!("not valid JSON: {e}")))?;
        for (slot, source) in self.fields.iter().enumerate() {
            if let FieldSource::Constant(c) = source {
                values[slot] = Some(Value::Text(Cow::Owned(c.clone())));
            }
        }
        Ok(values)
    }

    /// Turn extracted values into an event (see [`Mapping::decode`]).
    pub fn interpret<'a>(
        &self,
        mut values: Vec<Option<Value<'a>>>,
    ) -> Result<Option<Event<'a>>, Reject> {
        let mut take = |f: Field| match values[f as usize].take() {
            None | Some(Value::Null) => None,
            Some(v) => Some(v),
        };
        let name = self.text(Field::Event, take(Field::Event))?;
        let (experiment, variant) = (take(Field::Experiment), take(Field::Variant));
        let (unit, time) = (take(Field::Unit), take(Field::Time));
        let (count, exposure, id) = (take(Field::Count), take(Field::Exposure), take(Field::Id));
        let Some(name) = name else {
            return Err(self.missing(Field::Event));
        };
        let is_exposure = self.exposures.iter().any(|e| *e == *name);
        let metric = self.metric_of(&name);
        if !is_exposure && metric.is_none() {
            return Ok(None);
        }
        let unit = self
            .text(Field::Unit, unit)?
            .ok_or_else(|| self.missing(Field::Unit))?;
        let time = self.time(time.ok_or_else(|| self.missing(Field::Time))?)?;
        let experiment = self.text(Field::Experiment, experiment)?;
        let id = self.text(Field::Id, id)?;
        let body = if is_exposure {
            let variant = self
                .text(Field::Variant, variant)?
                .ok_or_else(|| self.missing(Field::Variant))?;
            if experiment.is_none() {
                return Err(self.missing(Field::Experiment));
            }
            EventBody::Exposure { variant, unit }
        } else {
            EventBody::Outcome {
                metric: Cow::Owned(metric.unwrap_or_default().to_string()),
                unit,
                count: match count {
                    None => 1,
                    Some(v) => self.count(v)?,
                },
                exposure: match exposure {
                    None => None,
                    Some(v) => Some(self.amount(v)?),
                },
            }
        };
        Ok(Some(Event {
            experiment: experiment.unwrap_or(Cow::Borrowed("")),
            id,
            time: Some(time),
            body,
        }))
    }

    fn missing(&self, f: Field) -> Reject {
        Reject::new(
            RejectReason::MissingField,
            format!(
                "source `{}`: {} is missing or null",
                self.name,
                self.describe(f)
            ),
        )
    }

    fn wrong(&self, f: Field, want: &str, got: &Value<'_>) -> Reject {
        Reject::new(
            RejectReason::WrongType,
            format!(
                "source `{}`: {} must be {want}, got {}",
                self.name,
                self.describe(f),
                got.kind()
            ),
        )
    }

    /// A name-like value: text, or an integer written as its digits (numeric user ids).
    fn text<'a>(&self, f: Field, v: Option<Value<'a>>) -> Result<Option<Cow<'a, str>>, Reject> {
        match v {
            None => Ok(None),
            Some(Value::Text(t)) => Ok(Some(t)),
            Some(Value::Int(n)) => Ok(Some(Cow::Owned(n.to_string()))),
            Some(Value::UInt(n)) => Ok(Some(Cow::Owned(n.to_string()))),
            Some(other) => Err(self.wrong(f, "a string or an integer", &other)),
        }
    }

    fn time(&self, v: Value<'_>) -> Result<Micros, Reject> {
        let bad_time = |detail: String| {
            Reject::new(
                RejectReason::BadTime,
                format!(
                    "source `{}`: {} {detail}",
                    self.name,
                    self.describe(Field::Time)
                ),
            )
        };
        let scale = self.time_format.micros_per_unit();
        let number = match (self.time_format, &v) {
            (TimeFormat::Rfc3339, Value::Text(t)) => {
                return parse_time(t)
                    .map_err(|r| bad_time(format!("is not RFC 3339: {}", r.message)));
            }
            (TimeFormat::Rfc3339, other) => {
                return Err(self.wrong(Field::Time, "RFC 3339 text", other));
            }
            (_, Value::Int(n)) => *n as f64,
            (_, Value::UInt(n)) => *n as f64,
            (_, Value::Float(x)) => *x,
            (_, Value::Text(t)) => match t.trim().parse::<i64>() {
                Ok(n) => n as f64,
                Err(_) => t
                    .trim()
                    .parse::<f64>()
                    .map_err(|_| bad_time(format!("is not a number: {t:?}")))?,
            },
            (_, other) => {
                return Err(self.wrong(Field::Time, "a number or a string of one", other))
            }
        };
        let micros = number * scale;
        // Years 1970..=9999: anything else is a unit mistake (seconds read as milliseconds).
        if !(0.0..=253_402_300_799e6).contains(&micros) {
            return Err(bad_time(format!(
                "is {number}, which as {} is outside the years 1970-9999",
                TimeFormat::ALL[self.time_format as usize].0
            )));
        }
        Ok(micros as Micros)
    }

    fn count(&self, v: Value<'_>) -> Result<u64, Reject> {
        match v {
            Value::UInt(n) => Ok(n),
            Value::Int(n) if n < 0 => Err(Reject::new(
                RejectReason::NegativeValue,
                format!(
                    "source `{}`: {} must not be negative (got {n})",
                    self.name,
                    self.describe(Field::Count)
                ),
            )),
            Value::Int(n) => Ok(n as u64),
            other => Err(self.wrong(Field::Count, "a whole number", &other)),
        }
    }

    fn amount(&self, v: Value<'_>) -> Result<f64, Reject> {
        let x = match v {
            Value::Int(n) => n as f64,
            Value::UInt(n) => n as f64,
            Value::Float(x) => x,
            other => return Err(self.wrong(Field::Exposure, "a number", &other)),
        };
        if x < 0.0 {
            return Err(Reject::new(
                RejectReason::NegativeValue,
                format!(
                    "source `{}`: {} must not be negative (got {x})",
                    self.name,
                    self.describe(Field::Exposure)
                ),
            ));
        }
        Ok(x)
    }
}

/// A value found at a mapped path.
#[derive(Debug, Clone, PartialEq)]
pub enum Value<'a> {
    /// A string, borrowed when it has no escapes.
    Text(Cow<'a, str>),
    /// A negative integer (or any integer that fits i64).
    Int(i64),
    /// A non-negative integer beyond i64.
    UInt(u64),
    /// A number with a fraction or exponent.
    Float(f64),
    /// `true` or `false`.
    Bool(bool),
    /// `null`.
    Null,
    /// An object or an array.
    Composite,
}

impl Value<'_> {
    /// The JSON kind, for messages.
    pub fn kind(&self) -> &'static str {
        match self {
            Value::Text(_) => "a string",
            Value::Int(_) | Value::UInt(_) => "an integer",
            Value::Float(_) => "a number with a fraction",
            Value::Bool(_) => "a boolean",
            Value::Null => "null",
            Value::Composite => "an object or array",
        }
    }
}

impl fmt::Display for Value<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Value::Text(t) => write!(f, "{t:?}"),
            Value::Int(n) => write!(f, "{n}"),
            Value::UInt(n) => write!(f, "{n}"),
            Value::Float(x) => write!(f, "{x}"),
            Value::Bool(b) => write!(f, "{b}"),
            Value::Null => f.write_str("null"),
            Value::Composite => f.write_str("(object or array)"),
        }
    }
}

/// Walks one JSON value at a trie node, storing what mapped paths end at.
struct Seed<'t, 'o, 'a> {
    trie: &'t Trie,
    node: usize,
    out: &'o mut [Option<Value<'a>>],
}

impl<'t, 'o, 'a> Seed<'t, 'o, 'a> {
    fn store(self, v: Value<'a>) {
        if let Some(slot) = self.trie.0[self.node].slot {
            self.out[slot] = Some(v);
        }
    }
}

impl<'de: 'a, 'a> DeserializeSeed<'de> for Seed<'_, '_, 'a> {
    type Value = ();
    fn deserialize<D: serde::Deserializer<'de>>(self, d: D) -> Result<(), D::Error> {
        d.deserialize_any(self)
    }
}

/// An object key, borrowed when it has no escapes.
struct Key<'a>(Cow<'a, str>);

impl<'de: 'a, 'a> serde::Deserialize<'de> for Key<'a> {
    fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V<'a>(std::marker::PhantomData<&'a ()>);
        impl<'de: 'a, 'a> Visitor<'de> for V<'a> {
            type Value = Key<'a>;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a key")
            }
            fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Key<'a>, E> {
                Ok(Key(Cow::Borrowed(v)))
            }
            fn visit_str<E>(self, v: &str) -> Result<Key<'a>, E> {
                Ok(Key(Cow::Owned(v.to_owned())))
            }
        }
        d.deserialize_str(V(std::marker::PhantomData))
    }
}

impl<'de: 'a, 'a> Visitor<'de> for Seed<'_, '_, 'a> {
    type Value = ();
    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }
    fn visit_borrowed_str<E>(self, v: &'de str) -> Result<(), E> {
        self.store(Value::Text(Cow::Borrowed(v)));
        Ok(())
    }
    fn visit_str<E>(self, v: &str) -> Result<(), E> {
        self.store(Value::Text(Cow::Owned(v.to_owned())));
        Ok(())
    }
    fn visit_i64<E>(self, v: i64) -> Result<(), E> {
        self.store(Value::Int(v));
        Ok(())
    }
    fn visit_u64<E>(self, v: u64) -> Result<(), E> {
        self.store(match i64::try_from(v) {
            Ok(n) => Value::Int(n),
            Err(_) => Value::UInt(v),
        });
        Ok(())
    }
    fn visit_f64<E>(self, v: f64) -> Result<(), E> {
        self.store(Value::Float(v));
        Ok(())
    }
    fn visit_bool<E>(self, v: bool) -> Result<(), E> {
        self.store(Value::Bool(v));
        Ok(())
    }
    fn visit_unit<E>(self) -> Result<(), E> {
        self.store(Value::Null);
        Ok(())
    }
    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<(), A::Error> {
        let Seed { trie, node, out } = self;
        if let Some(slot) = trie.0[node].slot {
            out[slot] = Some(Value::Composite);
        }
        while let Some(Key(key)) = map.next_key::<Key<'de>>()? {
            match trie.child(node, &key) {
                Some(child) => map.next_value_seed(Seed {
                    trie,
                    node: child,
                    out: &mut *out,
                })?,
                None => {
                    map.next_value::<IgnoredAny>()?;
                }
            }
        }
        Ok(())
    }
    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<(), A::Error> {
        let Seed { trie, node, out } = self;
        if let Some(slot) = trie.0[node].slot {
            out[slot] = Some(Value::Composite);
        }
        let mut i = 0usize;
        loop {
            let child = trie.child(node, &i.to_string());
            let more = match child {
                Some(child) => seq
                    .next_element_seed(Seed {
                        trie,
                        node: child,
                        out: &mut *out,
                    })?
                    .is_some(),
                None => seq.next_element::<IgnoredAny>()?.is_some(),
            };
            if !more {
                return Ok(());
            }
            i += 1;
        }
    }
}

#[cfg(test)]
mod tests;
