//! Where an event came from: the label every per-source counter and view carries. Its own
//! module so that the metrics and the event-time checks can both name it without importing
//! each other.

/// Where an event came from; a label on the event counters.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Source {
    /// `POST /v1/events`.
    Http,
    /// The Kafka consumer.
    Kafka,
    /// The built-in traffic simulator of `demo`.
    Simulator,
}

impl Source {
    /// Label value.
    pub fn as_str(self) -> &'static str {
        match self {
            Source::Http => "http",
            Source::Kafka => "kafka",
            Source::Simulator => "simulator",
        }
    }
}
