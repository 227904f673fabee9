//! Where each experiment of the fleet stands: one verdict per experiment (its summary and the
//! rules that hold on it), refreshed in rounds for the experiments whose totals changed, and
//! joined per request with the live list of experiments and the alert book. The fleet lists
//! and the dashboard overview read only this: no request runs quadrature.
//!
//! Standings, in the order they apply: harm, data quality, ready for a decision, decided,
//! gathering evidence (see [`Standing`]).

use std::collections::{HashMap, HashSet};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::{Arc, Mutex};

use crate::decide::alerts::{Alert, AlertState};
use crate::decide::{Finding, Rule};
use crate::experiment::ExperimentDef;
use crate::state::ExperimentSnapshot;
use crate::summary::{summarize_rules_only, ExperimentSummary};

use super::readings::SummaryCache;

/// Where an experiment stands, for the person looking after many. One per experiment: the
/// first that applies, in the order below, so the counts add up to the number of experiments.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Standing {
    /// A variant is worse than the control on some metric (the harm rule holds).
    Harm,
    /// The sample ratio or the crossovers are off: no number is trustworthy yet.
    Quality,
    /// A final rule (ship, equivalence, out of time) holds or was recorded, and no person has
    /// acknowledged the recorded decision.
    Ready,
    /// A person acknowledged a recorded final decision.
    Decided,
    /// None of the above: the experiment is still gathering evidence (or has none yet).
    Gathering,
}

impl Standing {
    /// Every standing, in the order the overview shows them.
    pub const ALL: [Standing; 5] = [
        Standing::Harm,
        Standing::Quality,
        Standing::Ready,
        Standing::Gathering,
        Standing::Decided,
    ];

    /// Name in the API and in query strings.
    pub fn as_str(self) -> &'static str {
        match self {
            Standing::Harm => "harm",
            Standing::Quality => "data_quality",
            Standing::Ready => "ready",
            Standing::Decided => "decided",
            Standing::Gathering => "gathering",
        }
    }

    /// The standing called `name`.
    pub fn parse(name: &str) -> Option<Standing> {
        Standing::ALL.into_iter().find(|s| s.as_str() == name)
    }

    /// Words on the dashboard.
    pub fn label(self) -> &'static str {
        match self {
            Standing::Harm => "a variant looks worse",
            Standing::Quality => "check the data first",
            Standing::Ready => "ready for a decision",
            Standing::Decided => "decided",
            Standing::Gathering => "gathering evidence",
        }
    }

    /// Whether a person should look at it now.
    pub fn needs_a_person(self) -> bool {
        matches!(self, Standing::Harm | Standing::Quality | Standing::Ready)
    }

    /// Place in the "needs a person first" order.
    pub fn rank(self) -> i64 {
        match self {
            Standing::Harm => 0,
            Standing::Quality => 1,
            Standing::Ready => 2,
            Standing::Gathering => 3,
            Standing::Decided => 4,
        }
    }
}

/// The latest summary of one experiment and the rules that hold on it.
#[derive(Debug)]
pub struct Verdict {
    /// The summary: the readers' full one when it had exactly these totals, otherwise one
    /// with only what the rules and P(best) need ([`summarize_rules_only`]: the same
    /// findings bit for bit, no lift intervals, at a fraction of the cost).
    pub summary: Arc<ExperimentSummary>,
    /// The rules that hold on it.
    pub findings: Vec<Finding>,
    /// The rules of `findings`, once each, in rule order.
    pub rules: Vec<Rule>,
}

impl Verdict {
    fn new(summary: Arc<ExperimentSummary>) -> Verdict {
        let findings = crate::decide::evaluate(&summary);
        let mut rules: Vec<Rule> = findings.iter().map(|f| f.rule).collect();
        rules.sort();
        rules.dedup();
        Verdict {
            summary,
            findings,
            rules,
        }
    }

    /// Exposed units in the summary.
    pub fn units(&self) -> u64 {
        self.summary.snapshot.units.iter().sum()
    }
}

/// One verdict per experiment, kept fresh in the background.
#[derive(Default)]
pub struct FleetIndex {
    verdicts: Mutex<HashMap<String, Arc<Verdict>>>,
    rounds: AtomicU64,
}

impl FleetIndex {
    /// Bring the verdicts in line with `snapshots` (every experiment now): summarise those
    /// whose totals changed (reusing the readers' cached summary when it has exactly these
    /// totals), drop those of experiments that are gone. Returns how many verdicts were
    /// recomputed.
    ///
    /// A summary computed here is not put in `summaries`: there it would count as young and
    /// be served to a reader who has just written an event, hiding that event for up to
    /// [`super::readings::MAX_AGE`].
    pub fn refresh(&self, snapshots: Vec<ExperimentSnapshot>, summaries: &SummaryCache) -> usize {
        let present: HashSet<String> = snapshots.iter().map(|s| s.def.id.clone()).collect();
        let mut changed = 0;
        for snap in snapshots {
            let old = self.lock().get(&snap.def.id).cloned();
            if old.as_ref().is_some_and(|v| v.summary.snapshot == snap) {
                continue;
            }
            // The quadrature runs outside the lock.
            let summary = summaries.exact(&snap).map_or_else(
                || Arc::new(summarize_rules_only(snap)),
                |r| Arc::clone(&r.summary),
            );
            let verdict = Arc::new(Verdict::new(summary));
            self.lock()
                .insert(verdict.summary.snapshot.def.id.clone(), verdict);
            changed += 1;
        }
        self.lock().retain(|id, _| present.contains(id));
        self.rounds.fetch_add(1, Ordering::Relaxed);
        changed
    }

    /// Completed refresh rounds since start.
    pub fn rounds(&self) -> u64 {
        self.rounds.load(Ordering::Relaxed)
    }

    /// The verdict of each of `defs` (`None` where none was computed yet).
    pub fn verdicts(&self, defs: &[Arc<ExperimentDef>]) -> Vec<Option<Arc<Verdict>>> {
        let map = self.lock();
        defs.iter().map(|d| map.get(&d.id).cloned()).collect()
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, HashMap<String, Arc<Verdict>>> {
        self.verdicts.lock().unwrap_or_else(|p| p.into_inner())
    }
}

/// What the alert book says about one experiment.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct AlertFacts {
    /// Alerts open or easing.
    pub open: usize,
    /// A harm alert (either harm rule) open or easing: the experiment reads as harmful until
    /// it closes, even between looks where the rule itself does not hold.
    pub open_harm: bool,
    /// A recorded final decision nobody acknowledged yet.
    pub unacknowledged_decision: bool,
    /// A recorded final decision somebody acknowledged.
    pub acknowledged_decision: bool,
    /// When the latest final decision was recorded or acknowledged.
    pub last_decision: Option<i64>,
}

/// [`AlertFacts`] per experiment id, from every alert.
pub fn alert_facts(alerts: &[Alert]) -> HashMap<String, AlertFacts> {
    let mut out: HashMap<String, AlertFacts> = HashMap::new();
    for a in alerts {
        let f = out.entry(a.key.experiment.clone()).or_default();
        match a.state {
            AlertState::Open | AlertState::Easing => {
                f.open += 1;
                f.open_harm |= matches!(a.key.rule, Rule::Harm | Rule::HarmEvidence);
            }
            AlertState::Closed => {}
            AlertState::Recorded => {
                let at = a.acknowledged_at.unwrap_or(a.opened_at);
                f.last_decision = Some(f.last_decision.map_or(at, |t| t.max(at)));
                if a.acknowledged_at.is_some() {
                    f.acknowledged_decision = true;
                } else {
                    f.unacknowledged_decision = true;
                }
            }
        }
    }
    out
}

/// Where an experiment stands, from the rules that hold and its alerts.
pub fn standing(rules: &[Rule], alerts: &AlertFacts) -> Standing {
    let holds = |r: Rule| rules.contains(&r);
    let final_holds = holds(Rule::Ship) || holds(Rule::Equivalent) || holds(Rule::Inconclusive);
    if holds(Rule::Harm) || holds(Rule::HarmEvidence) || alerts.open_harm {
        Standing::Harm
    } else if holds(Rule::SampleRatio) || holds(Rule::Crossovers) {
        Standing::Quality
    } else if alerts.unacknowledged_decision || (final_holds && !alerts.acknowledged_decision) {
        Standing::Ready
    } else if alerts.acknowledged_decision {
        Standing::Decided
    } else {
        Standing::Gathering
    }
}

/// One experiment of the fleet as a request sees it.
#[derive(Debug, Clone)]
pub struct Member {
    /// Its definition now.
    pub def: Arc<ExperimentDef>,
    /// Its latest verdict, `None` until the first refresh round reached it.
    pub verdict: Option<Arc<Verdict>>,
    /// Where it stands.
    pub standing: Standing,
    /// What the alert book says about it.
    pub alerts: AlertFacts,
}

impl Member {
    /// Exposed units at the verdict (0 before the first).
    pub fn units(&self) -> u64 {
        self.verdict.as_ref().map_or(0, |v| v.units())
    }

    /// Rules that hold at the verdict.
    pub fn rules(&self) -> &[Rule] {
        self.verdict.as_ref().map_or(&[], |v| &v.rules)
    }
}

/// Every experiment of `defs` with its verdict from `index`, its standing and what the alert
/// book's `facts` say about it.
pub fn members(
    defs: Vec<Arc<ExperimentDef>>,
    index: &FleetIndex,
    facts: &HashMap<String, AlertFacts>,
) -> Vec<Member> {
    let verdicts = index.verdicts(&defs);
    defs.into_iter()
        .zip(verdicts)
        .map(|(def, verdict)| {
            let alerts = facts.get(&def.id).copied().unwrap_or_default();
            let rules = verdict.as_ref().map_or(&[][..], |v| &v.rules[..]);
            let standing = standing(rules, &alerts);
            Member {
                def,
                verdict,
                standing,
                alerts,
            }
        })
        .collect()
}

/// The fleet in numbers: experiments per standing, open alerts, verdicts still missing.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Counts {
    /// Experiments in each standing, in [`Standing::ALL`] order.
    pub by_standing: [usize; 5],
    /// Experiments in all.
    pub experiments: usize,
    /// Alerts open or easing, over every experiment.
    pub open_alerts: usize,
    /// Experiments with at least one open alert.
    pub alerting: usize,
    /// Experiments without a verdict yet (new, or the first round is still running).
    pub pending: usize,
}

impl Counts {
    /// Count `members`.
    pub fn of(members: &[Member]) -> Counts {
        let mut c = Counts {
            experiments: members.len(),
            ..Counts::default()
        };
        for m in members {
            let i = Standing::ALL
                .iter()
                .position(|s| *s == m.standing)
                .expect("every standing is listed");
            c.by_standing[i] += 1;
            c.open_alerts += m.alerts.open;
            c.alerting += usize::from(m.alerts.open > 0);
            c.pending += usize::from(m.verdict.is_none());
        }
        c
    }

    /// Experiments standing at `s`.
    pub fn of_standing(&self, s: Standing) -> usize {
        let i = Standing::ALL.iter().position(|x| *x == s).expect("listed");
        self.by_standing[i]
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::decide::Finding;

    /// Three experiments of an invented plant nursery, defined as over the API, with no events.
    fn summaries_of() -> (SummaryCache, Vec<ExperimentSnapshot>) {
        let defs: Vec<ExperimentDef> = ["nursery-tray", "nursery-label", "nursery-bag"]
            .into_iter()
            .map(|id| {
                crate::config::experiment_from_json(
                    id,
                    &serde_json::json!({
                        "variants": [{"name": "control"}, {"name": "pear"}, {"name": "quince"}],
                        "metric": [{"name": "sprouted", "kind": "conversion"}]
                    }),
                )
                .unwrap()
            })
            .collect();
        let engine = crate::state::Engine::new(defs);
        let snaps = engine.experiments().map(|e| e.snapshot()).collect();
        (SummaryCache::default(), snaps)
    }

    #[test]
    fn refresh_recomputes_only_what_changed_and_forgets_the_deleted() {
        let (cache, snaps) = summaries_of();
        let n = snaps.len();
        assert!(n >= 2);
        let index = FleetIndex::default();
        // A summary the readers already share is reused, and the background work adds
        // nothing to their cache (it would look young there and hide newer events).
        let shared = Arc::clone(&cache.reading(snaps[0].clone()).summary);
        assert_eq!(index.refresh(snaps.clone(), &cache), n);
        assert!(snaps[1..].iter().all(|s| cache.exact(s).is_none()));
        let first = index
            .verdicts(&[Arc::clone(&snaps[0].def)])
            .remove(0)
            .unwrap();
        assert!(Arc::ptr_eq(&first.summary, &shared));
        assert_eq!(index.refresh(snaps.clone(), &cache), 0, "nothing changed");
        let defs: Vec<_> = snaps.iter().map(|s| Arc::clone(&s.def)).collect();
        assert!(index.verdicts(&defs).iter().all(Option::is_some));
        // One experiment gone: its verdict goes with it.
        assert_eq!(index.refresh(snaps[1..].to_vec(), &cache), 0);
        let v = index.verdicts(&defs);
        assert!(v[0].is_none() && v[1..].iter().all(Option::is_some));
        assert_eq!(index.rounds(), 3);
    }

    fn recorded(acknowledged: Option<i64>, opened: i64) -> Alert {
        Alert {
            id: format!("a{opened}"),
            key: crate::decide::alerts::AlertKey {
                experiment: "crumb-banner".into(),
                metric: None,
                variant: None,
                rule: Rule::Ship,
            },
            state: AlertState::Recorded,
            opened_at: opened,
            last_held_at: opened,
            closed_at: None,
            finding: Finding {
                rule: Rule::Ship,
                metric: None,
                variant: None,
                value: 0.0,
                threshold: 0.0,
                test: "",
                message: String::new(),
                evidence: Default::default(),
            },
            acknowledged_at: acknowledged,
        }
    }

    #[test]
    fn standing_follows_the_rules_then_the_people() {
        let none = AlertFacts::default();
        assert_eq!(standing(&[], &none), Standing::Gathering);
        assert_eq!(
            standing(&[Rule::SampleRatio, Rule::Harm], &none),
            Standing::Harm
        );
        assert_eq!(
            standing(&[Rule::Crossovers, Rule::Ship], &none),
            Standing::Quality
        );
        assert_eq!(standing(&[Rule::Equivalent], &none), Standing::Ready);
        let acked = alert_facts(&[recorded(Some(50), 10)])["crumb-banner"];
        assert_eq!(acked.last_decision, Some(50));
        assert_eq!(standing(&[Rule::Ship], &acked), Standing::Decided);
        assert_eq!(standing(&[], &acked), Standing::Decided);
        // A later decision nobody acknowledged needs a person again.
        let both = alert_facts(&[recorded(Some(50), 10), recorded(None, 70)])["crumb-banner"];
        assert_eq!(both.last_decision, Some(70));
        assert_eq!(standing(&[], &both), Standing::Ready);
        // An open (or easing) harm alert keeps the experiment harmful, never "gathering".
        let mut harm = recorded(None, 80);
        harm.key.rule = Rule::Harm;
        harm.state = AlertState::Easing;
        let easing = alert_facts(&[harm])["crumb-banner"];
        assert_eq!(standing(&[], &easing), Standing::Harm);
    }
}
