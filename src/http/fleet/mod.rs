//! The fleet view's HTTP face: filters, orders and cursors ([`query`]) and the paged list
//! routes ([`api`]). Where each experiment stands comes from [`crate::service::fleet`].

pub mod api;
pub mod query;

use crate::service::fleet::Member;
use query::Facts;

/// What the lists filter and sort on, for `m`.
pub fn facts(m: &Member) -> Facts<'_> {
    Facts {
        id: &m.def.id,
        standing: m.standing,
        rules: m.rules(),
        metrics: &m.def.metrics,
        open_alerts: m.alerts.open,
        last_decision: m.alerts.last_decision,
        units: m.units(),
    }
}
