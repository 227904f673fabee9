//! The alert lifecycle: a finding opens an alert once per (experiment, metric, variant, rule);
//! an alert whose finding stops holding eases, and closes only after the hold-down has passed
//! without the finding coming back (no flapping). Final decisions (`ship`, `equivalent`) are
//! recorded once and kept. Pure: the caller passes the time.

use super::{Finding, Rule};
use crate::event::Micros;
use crate::experiment::ExperimentDef;

/// Where an alert is in its life. Plain words, as read by the person on call.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum AlertState {
    /// The finding holds.
    Open,
    /// The finding stopped holding; closes after the hold-down unless it returns.
    Easing,
    /// The finding stayed away for the hold-down.
    Closed,
    /// A final decision, recorded once and kept.
    Recorded,
}

impl AlertState {
    /// Every state.
    pub const ALL: [AlertState; 4] = [
        AlertState::Open,
        AlertState::Easing,
        AlertState::Closed,
        AlertState::Recorded,
    ];

    /// The state called `name`.
    pub fn from_name(name: &str) -> Option<AlertState> {
        AlertState::ALL.into_iter().find(|s| s.as_str() == name)
    }

    /// Stable name used in the API.
    pub fn as_str(self) -> &'static str {
        match self {
            AlertState::Open => "open",
            AlertState::Easing => "easing",
            AlertState::Closed => "closed",
            AlertState::Recorded => "recorded",
        }
    }
}

/// What an alert is about.
#[derive(Debug, Clone, PartialEq, Eq, Hash)]
pub struct AlertKey {
    /// Experiment id.
    pub experiment: String,
    /// Metric name, for metric rules.
    pub metric: Option<String>,
    /// Variant name, for per-variant rules.
    pub variant: Option<String>,
    /// The rule.
    pub rule: Rule,
}

/// One alert.
#[derive(Debug, Clone, PartialEq)]
pub struct Alert {
    /// Stable id, also the idempotency key for receivers.
    pub id: String,
    /// What it is about.
    pub key: AlertKey,
    /// Where it is in its life.
    pub state: AlertState,
    /// When it opened.
    pub opened_at: Micros,
    /// When its finding last held.
    pub last_held_at: Micros,
    /// When it closed.
    pub closed_at: Option<Micros>,
    /// The finding as it last held.
    pub finding: Finding,
    /// When someone acknowledged it, if anyone did.
    pub acknowledged_at: Option<Micros>,
}

impl Alert {
    /// What the alert says in its present state: the finding's own message (with its advice)
    /// while it is open, easing or recorded; once closed, that it no longer holds, with the
    /// numbers it last held with and no advice to act.
    pub fn message_now(&self) -> String {
        if self.state != AlertState::Closed {
            return self.finding.message.clone();
        }
        let about: Vec<String> = [
            Some(format!("`{}`", self.key.experiment)),
            self.key.metric.as_ref().map(|m| format!("`{m}`")),
            self.key.variant.as_ref().map(|v| format!("`{v}`")),
        ]
        .into_iter()
        .flatten()
        .collect();
        format!(
            "closed: the `{}` rule on {} has not held for the whole hold-down; when it last held, {} was {} against the threshold {}",
            self.key.rule.as_str(),
            about.join(" / "),
            self.finding.test,
            self.finding.value,
            self.finding.threshold
        )
    }
}

/// A change worth telling people about.
#[derive(Debug, Clone, PartialEq)]
pub enum AlertChange {
    /// A new alert (or a recorded decision).
    Opened(Alert),
    /// An alert closed after its hold-down.
    Closed(Alert),
}

/// All alerts of this process.
#[derive(Debug, Clone)]
pub struct AlertBook {
    alerts: Vec<Alert>,
    hold_down: Micros,
    evidence: super::betting::EvidenceBook,
}

fn is_final(rule: Rule) -> bool {
    matches!(rule, Rule::Ship | Rule::Equivalent | Rule::Inconclusive)
}

impl AlertBook {
    /// An empty book with the given hold-down (microseconds).
    pub fn new(hold_down: Micros) -> AlertBook {
        AlertBook {
            alerts: Vec::new(),
            hold_down,
            evidence: super::betting::EvidenceBook::new(true),
        }
    }

    /// An empty book whose anytime-valid harm processes keep no confidence sequences (for
    /// `plan`, which reads only the alarms).
    pub fn without_intervals(hold_down: Micros) -> AlertBook {
        AlertBook {
            evidence: super::betting::EvidenceBook::new(false),
            ..AlertBook::new(hold_down)
        }
    }

    /// The anytime-valid harm processes.
    pub fn evidence(&self) -> &super::betting::EvidenceBook {
        &self.evidence
    }

    /// The anytime-valid harm processes, to advance them.
    pub fn evidence_mut(&mut self) -> &mut super::betting::EvidenceBook {
        &mut self.evidence
    }

    /// A book holding `alerts` (restored from the store).
    pub fn from_alerts(alerts: Vec<Alert>, hold_down: Micros) -> AlertBook {
        AlertBook {
            alerts,
            hold_down,
            evidence: super::betting::EvidenceBook::new(true),
        }
    }

    /// Replace every alert of experiment `id` with `alerts` (the book of its new owner, or
    /// the owner's book as another instance reads it), keeping the others' order.
    pub fn replace_experiment(&mut self, id: &str, alerts: Vec<Alert>) {
        self.alerts.retain(|a| a.key.experiment != id);
        self.alerts
            .extend(alerts.into_iter().filter(|a| a.key.experiment == id));
    }

    /// Every alert, oldest first.
    pub fn alerts(&self) -> &[Alert] {
        &self.alerts
    }

    /// Acknowledge alert `id` at `now` (idempotent); `None` if there is no such alert.
    pub fn acknowledge(&mut self, id: &str, now: Micros) -> Option<&Alert> {
        let a = self.alerts.iter_mut().find(|a| a.id == id)?;
        a.acknowledged_at.get_or_insert(now);
        Some(a)
    }

    /// Fold the findings of one evaluation of `def` at time `now` into the book.
    pub fn update(
        &mut self,
        def: &ExperimentDef,
        findings: &[Finding],
        now: Micros,
    ) -> Vec<AlertChange> {
        let key_of = |f: &Finding| AlertKey {
            experiment: def.id.clone(),
            metric: f.metric.map(|m| def.metrics[m].name.clone()),
            variant: f.variant.map(|v| def.variants[v].name.clone()),
            rule: f.rule,
        };
        let mut changes = Vec::new();
        let held: Vec<(AlertKey, &Finding)> = findings.iter().map(|f| (key_of(f), f)).collect();
        for (key, finding) in &held {
            let live = self.alerts.iter_mut().find(|a| {
                a.key == *key
                    && matches!(
                        a.state,
                        AlertState::Open | AlertState::Easing | AlertState::Recorded
                    )
            });
            match live {
                Some(a) => {
                    if a.state == AlertState::Easing {
                        a.state = AlertState::Open;
                    }
                    if a.state != AlertState::Recorded {
                        a.finding = (*finding).clone();
                    }
                    a.last_held_at = now;
                }
                None => {
                    let alert = Alert {
                        id: alert_id(key, now),
                        key: key.clone(),
                        state: if is_final(key.rule) {
                            AlertState::Recorded
                        } else {
                            AlertState::Open
                        },
                        opened_at: now,
                        last_held_at: now,
                        closed_at: None,
                        finding: (*finding).clone(),
                        acknowledged_at: None,
                    };
                    changes.push(AlertChange::Opened(alert.clone()));
                    self.alerts.push(alert);
                }
            }
        }
        for a in self
            .alerts
            .iter_mut()
            .filter(|a| a.key.experiment == def.id)
        {
            if held.iter().any(|(k, _)| *k == a.key) {
                continue;
            }
            match a.state {
                AlertState::Open => a.state = AlertState::Easing,
                AlertState::Easing if now - a.last_held_at >= self.hold_down => {
                    a.state = AlertState::Closed;
                    a.closed_at = Some(now);
                    changes.push(AlertChange::Closed(a.clone()));
                }
                _ => {}
            }
        }
        changes
    }
}

/// A stable id: the same alert gets the same id wherever it is computed.
fn alert_id(key: &AlertKey, opened_at: Micros) -> String {
    let text = format!(
        "{}|{}|{}|{}|{opened_at}",
        key.experiment,
        key.metric.as_deref().unwrap_or(""),
        key.variant.as_deref().unwrap_or(""),
        key.rule.as_str()
    );
    format!("{:016x}", crate::state::units::key_hash(&text))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::experiment::{
        ExperimentRules, MetricDef, MetricKind, MetricRules, Prior, VariantDef,
    };

    fn def() -> ExperimentDef {
        ExperimentDef {
            id: "orchard-renderer".into(),
            generation: 0,
            control: 0,
            variants: ["control", "new"]
                .iter()
                .map(|n| VariantDef {
                    name: n.to_string(),
                    weight: 0.5,
                })
                .collect(),
            metrics: vec![MetricDef {
                name: "crash".into(),
                kind: MetricKind::Conversion,
                prior: Prior::Beta {
                    alpha: 1.0,
                    beta: 1.0,
                },
                variant_priors: vec![None, None],
                rules: MetricRules::default(),
            }],
            rules: ExperimentRules::default(),
        }
    }

    fn finding(rule: Rule) -> Finding {
        Finding {
            evidence: Default::default(),
            rule,
            metric: Some(0),
            variant: Some(1),
            value: 0.995,
            threshold: 0.99,
            test: "prob_harm >= threshold",
            message: "worse".into(),
        }
    }

    const S: Micros = 1_000_000;

    #[test]
    fn an_alert_opens_once_eases_and_closes_after_the_hold_down() {
        let d = def();
        let mut book = AlertBook::new(60 * S);
        let harm = [finding(Rule::Harm)];
        let opened = book.update(&d, &harm, 0);
        assert!(matches!(&opened[..], [AlertChange::Opened(a)] if a.state == AlertState::Open));
        assert!(book.update(&d, &harm, 10 * S).is_empty(), "raised once");
        // Stops holding: eases, no message yet.
        assert!(book.update(&d, &[], 20 * S).is_empty());
        assert_eq!(book.alerts()[0].state, AlertState::Easing);
        // Comes back within the hold-down: open again, same alert, no new message.
        assert!(book.update(&d, &harm, 50 * S).is_empty());
        assert_eq!(book.alerts()[0].state, AlertState::Open);
        assert_eq!(book.alerts().len(), 1);
        // Away for less than the hold-down: still easing.
        assert!(book.update(&d, &[], 60 * S).is_empty());
        assert!(book.update(&d, &[], 50 * S + 60 * S - 1).is_empty());
        // Away for the full hold-down: closed, told once.
        let mut harm_advice = finding(Rule::Harm);
        harm_advice.message = "`b` is worse than `a`; consider stopping it".into();
        book.alerts[0].finding = harm_advice;
        assert!(book.alerts()[0].message_now().contains("consider stopping"));
        let closed = book.update(&d, &[], 110 * S);
        assert!(matches!(&closed[..], [AlertChange::Closed(a)] if a.closed_at == Some(110 * S)));
        // A closing alert says it no longer holds, never the advice of its opening.
        let [AlertChange::Closed(a)] = &closed[..] else {
            panic!("{closed:?}")
        };
        let said = a.message_now();
        assert!(said.starts_with("closed: the `harm` rule"), "{said}");
        assert!(!said.contains("consider stopping"), "{said}");
        assert!(book.update(&d, &[], 200 * S).is_empty());
        // Holding again later is a new alert with a new id.
        let again = book.update(&d, &harm, 300 * S);
        let [AlertChange::Opened(a)] = &again[..] else {
            panic!("{again:?}")
        };
        assert_ne!(a.id, book.alerts()[0].id);
    }

    #[test]
    fn final_decisions_are_recorded_once_and_kept() {
        let d = def();
        let mut book = AlertBook::new(S);
        let ship = [finding(Rule::Ship)];
        assert_eq!(book.update(&d, &ship, 0).len(), 1);
        assert!(book.update(&d, &[], 100 * S).is_empty());
        assert!(book.update(&d, &ship, 200 * S).is_empty());
        assert_eq!(book.alerts().len(), 1);
        assert_eq!(book.alerts()[0].state, AlertState::Recorded);
    }
}
