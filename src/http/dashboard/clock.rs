//! Clock health of the sources: the `/v1/event-time` document and the small dashboard panel
//! that shows, per source, the share of events refused or clamped because the sender's clock
//! was off, and the largest skew seen.

use std::fmt::Write;
use std::sync::Arc;

use axum::extract::State;
use axum::Json;
use serde_json::Value;

use super::markup::escape;
use crate::service::clock::{self, SourceClock};
use crate::service::Service;

/// `GET /v1/event-time`: each source's checks and bounds.
pub async fn get_event_time(State(service): State<Arc<Service>>) -> Json<Value> {
    Json(clock::document(&service.metrics().clock, |s| {
        service.time_bounds(s)
    }))
}

fn seconds(us: i64) -> String {
    let s = us as f64 / 1e6;
    if s == 0.0 {
        "—".into()
    } else if s < 3_600.0 {
        format!("{s:.0} s")
    } else if s < 2.0 * 86_400.0 {
        format!("{:.1} h", s / 3_600.0)
    } else if s < 730.0 * 86_400.0 {
        format!("{:.1} days", s / 86_400.0)
    } else {
        format!("{:.0} years", s / (365.25 * 86_400.0))
    }
}

/// The panel: one row per source that has seen timed events.
pub fn panel(service: &Service) -> String {
    let rows: Vec<(String, SourceClock)> = service
        .metrics()
        .clock
        .snapshot()
        .into_iter()
        .filter(|(_, c)| c.checked + c.unchecked > 0)
        .map(|(s, c)| (s.as_str().to_string(), c))
        .collect();
    let mut out = String::from(
        r#"<section class="clock-health" data-role="clock-health"><h2>Sender clocks</h2>"#,
    );
    if rows.is_empty() {
        out.push_str(r#"<p class="muted">No timed events yet.</p></section>"#);
        return out;
    }
    out.push_str(
        "<table><thead><tr><th>source</th><th>checked</th><th>refused or clamped</th>\
         <th>largest ahead</th><th>largest behind</th><th>unchecked</th></tr></thead><tbody>",
    );
    for (source, c) in &rows {
        let skewed = c.refused.iter().sum::<u64>() + c.clamped.iter().sum::<u64>();
        let _ = write!(
            out,
            r#"<tr data-source="{s}" data-skewed="{skewed}"><td>{s}</td><td>{checked}</td><td>{skewed} ({share:.2}%)</td><td>{ahead}</td><td>{behind}</td><td>{unchecked}</td></tr>"#,
            s = escape(source),
            checked = c.checked,
            share = 100.0 * c.skewed_share(),
            ahead = seconds(c.largest[0]),
            behind = seconds(c.largest[1]),
            unchecked = c.unchecked,
        );
    }
    out.push_str(
        r#"</tbody></table><p class="muted">Events whose time is too far from when they were received (Kafka record time, HTTP receive time) never reach an experiment's counts or clock; a rising share means some senders' clocks are wrong — check them before trusting durations. JSON: <a href="/v1/event-time">/v1/event-time</a>.</p></section>"#,
    );
    out
}
