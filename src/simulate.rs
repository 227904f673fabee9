//! Built-in traffic simulator for `demo`: invented experiments of a fictional online bakery
//! ("Crumb & Co") and a fictional gardening app ("Pocket Orchard"), with realistic rates, a
//! little dirt (duplicate exposures, producer retries, crossovers, orphans) and one clearly worse
//! variant per scenario family, fed through the same decode → apply path as real events.

use std::sync::Arc;
use std::time::Duration;

use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::{Distribution, Poisson};
use tokio_util::sync::CancellationToken;

use crate::experiment::{
    ExperimentDef, ExperimentRules, ExposureBasis, MetricDef, MetricKind, Prior, VariantDef,
};
use crate::service::metrics::Source;
use crate::service::Service;

/// How the simulator runs.
#[derive(Debug, Clone)]
pub struct SimulateOptions {
    /// New units per second per experiment.
    pub units_per_second: f64,
    /// Random seed (same seed → same event sequence per tick).
    pub seed: u64,
}

impl Default for SimulateOptions {
    fn default() -> Self {
        SimulateOptions {
            units_per_second: 60.0,
            seed: 7,
        }
    }
}

/// Truth of one variant: conversion probability or defect rate per metric, in metric order.
#[derive(Debug, Clone)]
struct VariantTruth {
    rates: Vec<f64>,
}

/// One simulated experiment.
#[derive(Debug, Clone)]
pub struct Scenario {
    /// What is configured.
    pub def: ExperimentDef,
    truths: Vec<VariantTruth>,
}

fn variants(names: &[(&str, f64)]) -> Vec<VariantDef> {
    names
        .iter()
        .map(|(n, w)| VariantDef {
            name: (*n).to_string(),
            weight: *w,
        })
        .collect()
}

fn metric(name: &str, kind: MetricKind, prior: Prior, n_variants: usize) -> MetricDef {
    let mut rules = crate::experiment::MetricRules::default();
    if kind == MetricKind::DefectRate(ExposureBasis::Reported) {
        // As the config does for reported exposure: the metric's own minimum is exposure.
        rules.min_units = 0;
    }
    if kind == MetricKind::Conversion {
        // The demo's teams care about 0.05 percentage points of conversion: small enough that
        // a demo run does not "ship" after a few hundred units (a poor example to set; see
        // docs/planning.md on calibrating this threshold).
        rules.ship = Some(crate::experiment::ShipRule {
            threshold_of_caring: 0.0005,
        });
    }
    MetricDef {
        name: name.into(),
        kind,
        prior,
        variant_priors: vec![None; n_variants],
        rules,
    }
}

const UNIFORM: Prior = Prior::Beta {
    alpha: 1.0,
    beta: 1.0,
};
const WEAK_GAMMA: Prior = Prior::Gamma {
    shape: 1.0,
    rate: 1.0,
};

/// The demo's experiments and their true rates.
pub fn demo_scenarios() -> Vec<Scenario> {
    let truths = |rows: &[&[f64]]| -> Vec<VariantTruth> {
        rows.iter()
            .map(|r| VariantTruth { rates: r.to_vec() })
            .collect()
    };
    vec![
        Scenario {
            def: ExperimentDef {
                id: "crumb-checkout-copy".into(),
                generation: 0,
                control: 0,
                variants: variants(&[("control", 0.5), ("short-copy", 0.5)]),
                metrics: vec![
                    metric("purchase", MetricKind::Conversion, UNIFORM, 2),
                    metric(
                        "payment-error",
                        MetricKind::DefectRate(ExposureBasis::Units),
                        WEAK_GAMMA,
                        2,
                    ),
                ],
                rules: ExperimentRules {
                    primary: 0,
                    guardrails: vec![1],
                    ..ExperimentRules::default()
                },
            },
            // Shorter checkout copy converts a little better; payment errors unchanged.
            truths: truths(&[&[0.112, 0.004], &[0.121, 0.004]]),
        },
        Scenario {
            def: ExperimentDef {
                id: "crumb-delivery-banner".into(),
                generation: 0,
                control: 0,
                variants: variants(&[
                    ("control", 0.34),
                    ("free-delivery", 0.33),
                    ("countdown", 0.33),
                ]),
                metrics: vec![metric("add-to-basket", MetricKind::Conversion, UNIFORM, 3)],
                rules: ExperimentRules::default(),
            },
            // The countdown banner annoys people: clearly worse.
            truths: truths(&[&[0.30], &[0.31], &[0.24]]),
        },
        Scenario {
            def: ExperimentDef {
                id: "orchard-new-renderer".into(),
                generation: 0,
                control: 0,
                variants: variants(&[("control", 0.5), ("new-renderer", 0.5)]),
                metrics: vec![
                    metric(
                        "crash",
                        MetricKind::DefectRate(ExposureBasis::Reported),
                        WEAK_GAMMA,
                        2,
                    ),
                    metric("next-day-return", MetricKind::Conversion, UNIFORM, 2),
                ],
                rules: ExperimentRules {
                    primary: 1,
                    guardrails: vec![0],
                    ..ExperimentRules::default()
                },
            },
            // Crashes per session: the new renderer crashes three times as often.
            truths: truths(&[&[0.002, 0.41], &[0.006, 0.41]]),
        },
        Scenario {
            def: ExperimentDef {
                id: "orchard-watering-reminder".into(),
                generation: 0,
                control: 0,
                variants: variants(&[("control", 0.5), ("evening-reminder", 0.5)]),
                metrics: vec![metric("plant-logged", MetricKind::Conversion, UNIFORM, 2)],
                rules: ExperimentRules::default(),
            },
            // An A/A-like test: no real difference.
            truths: truths(&[&[0.18], &[0.18]]),
        },
    ]
}

/// The demo's experiment definitions (what `demo` configures).
pub fn demo_experiments() -> Vec<ExperimentDef> {
    demo_scenarios().into_iter().map(|s| s.def).collect()
}

fn rfc3339_now() -> String {
    time::OffsetDateTime::now_utc()
        .format(&time::format_description::well_known::Rfc3339)
        .unwrap_or_else(|_| "1970-01-01T00:00:00Z".into())
}

/// Generates the encoded events of one tick of traffic.
pub struct Generator {
    scenarios: Vec<Scenario>,
    rng: StdRng,
    next_unit: u64,
    next_event: u64,
}

impl Generator {
    /// A generator over `scenarios` seeded with `seed`.
    pub fn new(scenarios: Vec<Scenario>, seed: u64) -> Generator {
        Generator {
            scenarios,
            rng: StdRng::seed_from_u64(seed),
            next_unit: 0,
            next_event: 0,
        }
    }

    fn pick_variant(&mut self, s: usize) -> usize {
        let x: f64 = self.rng.random();
        let mut acc = 0.0;
        let vs = &self.scenarios[s].def.variants;
        for (i, v) in vs.iter().enumerate() {
            acc += v.weight;
            if x < acc {
                return i;
            }
        }
        vs.len() - 1
    }

    fn event_id(&mut self) -> String {
        self.next_event += 1;
        format!("sim-{}", self.next_event)
    }

    /// Events for `units` new units in every scenario, as JSON lines.
    pub fn tick(&mut self, units: usize) -> Vec<String> {
        let now = rfc3339_now();
        let mut out = Vec::new();
        for s in 0..self.scenarios.len() {
            for _ in 0..units {
                self.unit_events(s, &now, &mut out);
            }
            // Now and then a client reports a conversion for a unit it never exposed.
            let conversion = self.scenarios[s]
                .def
                .metrics
                .iter()
                .find(|m| m.kind == MetricKind::Conversion)
                .map(|m| m.name.clone());
            if let Some(metric) = conversion {
                if self.rng.random_bool(0.05) {
                    let exp = &self.scenarios[s].def.id;
                    out.push(format!(
                        r#"{{"type":"conversion","experiment":"{exp}","metric":"{metric}","unit":"never-seen-{}","time":"{now}"}}"#,
                        self.rng.random::<u32>()
                    ));
                }
            }
        }
        out
    }

    fn unit_events(&mut self, s: usize, now: &str, out: &mut Vec<String>) {
        self.next_unit += 1;
        let unit = format!("u{}", self.next_unit);
        let v = self.pick_variant(s);
        let exp = self.scenarios[s].def.id.clone();
        let vname = self.scenarios[s].def.variants[v].name.clone();
        let id = self.event_id();
        let exposure = format!(
            r#"{{"type":"exposure","experiment":"{exp}","variant":"{vname}","unit":"{unit}","time":"{now}","id":"{id}"}}"#
        );
        out.push(exposure.clone());
        if self.rng.random_bool(0.01) {
            // A producer retry: same id, applied once.
            out.push(exposure);
        }
        if self.rng.random_bool(0.03) {
            // The page was shown again to the same unit.
            out.push(format!(
                r#"{{"type":"exposure","experiment":"{exp}","variant":"{vname}","unit":"{unit}","time":"{now}"}}"#
            ));
        }
        if self.rng.random_bool(0.002) {
            let n = self.scenarios[s].def.variants.len();
            let other = &self.scenarios[s].def.variants[(v + 1) % n].name;
            out.push(format!(
                r#"{{"type":"exposure","experiment":"{exp}","variant":"{other}","unit":"{unit}","time":"{now}"}}"#
            ));
        }
        let metrics: Vec<(String, MetricKind, f64)> = self.scenarios[s]
            .def
            .metrics
            .iter()
            .zip(&self.scenarios[s].truths[v].rates)
            .map(|(m, r)| (m.name.clone(), m.kind, *r))
            .collect();
        for (name, kind, rate) in metrics {
            match kind {
                MetricKind::Conversion => {
                    if self.rng.random_bool(rate) {
                        out.push(format!(
                            r#"{{"type":"conversion","experiment":"{exp}","metric":"{name}","unit":"{unit}","time":"{now}"}}"#
                        ));
                    }
                }
                MetricKind::DefectRate(ExposureBasis::Units) => {
                    let k = poisson(&mut self.rng, rate);
                    if k > 0 {
                        out.push(format!(
                            r#"{{"type":"defect","experiment":"{exp}","metric":"{name}","unit":"{unit}","count":{k},"time":"{now}"}}"#
                        ));
                    }
                }
                MetricKind::DefectRate(ExposureBasis::Reported) => {
                    // Each unit reports its sessions of the day and the crashes in them.
                    let sessions = 1 + poisson(&mut self.rng, 2.0);
                    let k = poisson(&mut self.rng, rate * sessions as f64);
                    out.push(format!(
                        r#"{{"type":"defect","experiment":"{exp}","metric":"{name}","unit":"{unit}","count":{k},"exposure":{sessions},"time":"{now}"}}"#
                    ));
                }
            }
        }
    }
}

fn poisson(rng: &mut StdRng, mean: f64) -> u64 {
    if mean <= 0.0 {
        return 0;
    }
    match Poisson::new(mean) {
        Ok(d) => d.sample(rng) as u64,
        Err(_) => 0,
    }
}

/// Shard of simulated events.
pub const SIMULATOR_SHARD: &str = "simulator";

fn items(lines: &[String]) -> Vec<crate::service::ingest::Item<'_>> {
    lines
        .iter()
        .map(|l| crate::service::ingest::Item {
            shard: SIMULATOR_SHARD,
            offset: None,
            bytes: l.as_bytes(),
            mapping: None,
            topic: None,
            reference: None,
        })
        .collect()
}

/// Feed simulated traffic into `service` every 100 ms until `shutdown`.
pub async fn run(options: SimulateOptions, service: Arc<Service>, shutdown: CancellationToken) {
    let scenarios: Vec<Scenario> = {
        let shards = service.lock_shards();
        demo_scenarios()
            .into_iter()
            .filter(|s| shards.has_experiment(&s.def.id))
            .collect()
    };
    let mut generator = Generator::new(scenarios, options.seed);
    let mut interval = tokio::time::interval(Duration::from_millis(100));
    let mut carry = 0.0;
    loop {
        tokio::select! {
            _ = shutdown.cancelled() => break,
            _ = interval.tick() => {}
        }
        carry += options.units_per_second / 10.0;
        let units = carry.floor() as usize;
        carry -= units as f64;
        let lines = generator.tick(units);
        let items = items(&lines);
        service.apply(Source::Simulator, &items);
    }
    tracing::info!("simulator stopped");
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::event::Outcome;
    use crate::service::metrics::Metrics;
    use crate::state::shards::Shards;
    use std::sync::Mutex;

    #[test]
    fn simulated_traffic_is_valid_and_exercises_every_outcome() {
        let shards = Mutex::new(Shards::new(demo_experiments()));
        let metrics = Metrics::new();
        let mut generator = Generator::new(demo_scenarios(), 1);
        let mut totals = [0u64; Outcome::PER_EXPERIMENT.len()];
        for _ in 0..200 {
            let lines = generator.tick(20);
            let report = crate::service::ingest::apply_batch(
                &shards,
                &metrics,
                Source::Simulator,
                &items(&lines),
                1 << 16,
            );
            assert_eq!(report.n_rejected(), 0, "{:?}", report.rejects().next());
            for (i, o) in Outcome::PER_EXPERIMENT.iter().enumerate() {
                totals[i] += report.count(*o);
            }
        }
        // DuplicateConversion is not simulated; every other outcome must show up.
        for (i, o) in Outcome::PER_EXPERIMENT.iter().enumerate() {
            if *o != Outcome::DuplicateConversion {
                assert!(totals[i] > 0, "no {o:?} in simulated traffic");
            }
        }
        let snap = shards
            .lock()
            .unwrap()
            .snapshot("crumb-checkout-copy")
            .unwrap();
        assert_eq!(snap.units.iter().sum::<u64>(), 4_000);
    }
}
