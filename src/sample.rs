//! `posteriord read-sample`: how the first lines of a sample file read under a source's
//! mapping — each line's mapped fields, what it reads as, and what applying it in order to the
//! configured experiments would do — so a mapping can be written against real data before it
//! is deployed.

use std::io::BufRead;

use crate::config::Config;
use crate::event::{EventBody, Reject};
use crate::mapping::{Field, Mapping};
use crate::state::Engine;

/// What one sample line did.
#[derive(Debug, Clone, PartialEq)]
pub struct SampleLine {
    /// One-based line number.
    pub line: usize,
    /// Each mapped field and the value found for it (`None`: not in the line).
    pub fields: Vec<(&'static str, Option<String>)>,
    /// What the line reads as and what applying it did, or why it was refused.
    pub verdict: Result<String, Reject>,
}

/// Read up to `limit` non-blank lines of `input` under `mapping`, applying them in order to a
/// fresh state of the configured experiments (so attribution shows what it would decide).
pub fn read_sample(
    config: &Config,
    mapping: &Mapping,
    input: impl BufRead,
    limit: usize,
) -> std::io::Result<Vec<SampleLine>> {
    let max = config.max_event_bytes();
    let mut engine = Engine::new(config.experiments.iter().cloned());
    let mut out = Vec::new();
    for (i, line) in input.split(b'\n').enumerate() {
        if out.len() >= limit {
            break;
        }
        let mut line = line?;
        while line.last().is_some_and(|b| *b == b'\r') {
            line.pop();
        }
        if line.iter().all(|b| b.is_ascii_whitespace()) {
            continue;
        }
        let (fields, verdict) = match mapping.extract(&line, max) {
            Err(r) => (Vec::new(), Err(r)),
            Ok(values) => {
                let fields = Field::ALL
                    .iter()
                    .zip(&values)
                    .filter(|((k, _), v)| v.is_some() || mapping_has(mapping, k))
                    .map(|((k, _), v)| (*k, v.as_ref().map(|v| v.to_string())))
                    .collect();
                let verdict = match mapping.interpret(values) {
                    Err(r) => Err(r),
                    Ok(None) => Ok("ignored: the event name maps to no metric".to_string()),
                    Ok(Some(event)) => {
                        let reads = match &event.body {
                            EventBody::Exposure { .. } => "exposure".to_string(),
                            EventBody::Outcome { metric, .. } if event.experiment.is_empty() => {
                                format!(
                                    "outcome for metric `{metric}`, attributed through exposures"
                                )
                            }
                            EventBody::Outcome { metric, .. } => format!(
                                "outcome for metric `{metric}` in experiment `{}`",
                                event.experiment
                            ),
                            other => format!("{other:?}"),
                        };
                        engine
                            .apply(&event)
                            .map(|o| format!("{reads}: {}", o.as_str()))
                    }
                };
                (fields, verdict)
            }
        };
        out.push(SampleLine {
            line: i + 1,
            fields,
            verdict,
        });
    }
    Ok(out)
}

fn mapping_has(mapping: &Mapping, key: &str) -> bool {
    mapping.path(key).is_some()
}

/// The report as text, one block per line.
pub fn to_text(lines: &[SampleLine]) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    for l in lines {
        let _ = writeln!(s, "line {}", l.line);
        for (k, v) in &l.fields {
            let _ = writeln!(s, "  {k:<10} {}", v.as_deref().unwrap_or("(absent)"));
        }
        match &l.verdict {
            Ok(v) => {
                let _ = writeln!(s, "  => {v}");
            }
            Err(r) => {
                let _ = writeln!(s, "  => rejected, {}: {}", r.reason.as_str(), r.message);
            }
        }
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    const CONFIG: &str = r#"
[[experiment]]
id = "fare-banner"
variants = [ { name = "calm" }, { name = "wave" } ]
[[experiment.metric]]
name = "purchase"
kind = "conversion"

[[source]]
name = "deckhand"
unit = "who.rider"
time = "at"
time_format = "epoch_millis"
experiment = "trial.key"
variant = "trial.arm"
exposures = ["assigned"]
constants = { event = "assigned" }

[[source]]
name = "tickets"
unit = "rider_id"
time = "ts"
event = "kind"
metrics = { "ticket.bought" = "purchase" }
"#;

    #[test]
    fn a_sample_shows_fields_and_what_each_line_does_in_order() {
        let config = Config::parse(CONFIG, "test.toml", &[]).unwrap();
        let deck = &config.source("deckhand").unwrap().mapping;
        let tickets = &config.source("tickets").unwrap().mapping;
        let assign = b"{\"who\":{\"rider\":\"r-1\"},\"at\":1767225600000,\"trial\":{\"key\":\"fare-banner\",\"arm\":\"wave\"}}\n\n{\"who\":{},\"at\":1767225600000,\"trial\":{\"key\":\"fare-banner\",\"arm\":\"wave\"}}\n";
        let got = read_sample(&config, deck, &assign[..], 10).unwrap();
        assert_eq!(got.len(), 2);
        assert_eq!(got[0].line, 1);
        assert_eq!(got[0].verdict, Ok("exposure: applied".to_string()));
        assert!(got[0].fields.contains(&("unit", Some("\"r-1\"".into()))));
        assert_eq!(got[1].line, 3);
        let r = got[1].verdict.clone().unwrap_err();
        assert_eq!(r.reason, crate::event::RejectReason::MissingField);
        let text = to_text(&got);
        assert!(text.contains("rejected, missing_field"), "{text}");
        // In a fresh state nobody was exposed: the purchase is counted as unexposed.
        let buy = b"{\"kind\":\"ticket.bought\",\"rider_id\":\"r-1\",\"ts\":\"2026-01-01T00:00:05Z\"}\n{\"kind\":\"app.open\",\"rider_id\":\"r-1\",\"ts\":\"2026-01-01T00:00:05Z\"}";
        let got = read_sample(&config, tickets, &buy[..], 1).unwrap();
        assert_eq!(got.len(), 1);
        assert_eq!(
            got[0].verdict,
            Ok("outcome for metric `purchase`, attributed through exposures: unexposed".into())
        );
        let got = read_sample(&config, tickets, &buy[..], 5).unwrap();
        assert_eq!(
            got[1].verdict,
            Ok("ignored: the event name maps to no metric".into())
        );
    }
}
