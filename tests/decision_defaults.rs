//! The default rules on a realistic plan (issue scenario rebuilt with an invented experiment,
//! tests/plan/tidewater-seat-map.toml): bookings at 5%, payment failures at 0.02 per user,
//! 4 000 users a day for 21 days, threshold of caring 0.001, everything else default. Measured
//! through `posteriord plan` (the service's own evaluation step). Targets, each checked as the
//! measured share within Monte Carlo error (3 standard errors, the share's own):
//! - a variant whose guardrail is 50% worse is shipped in ≤ 5% of runs;
//! - a variant 20% better on bookings loses to the control (the control is shipped) in ≤ 2%,
//!   and is shipped in ≥ 80% of runs within the 21 days;
//! - A/A: harm alerts (either harm rule) in ≤ 5% of runs.
//!
//! The default run looks once a day of event time with 200 runs per scenario, seconds
//! of a debug build; `POSTERIORD_SOAK=1` looks hourly (the config's cadence) with 1 000 runs.
//! docs/planning.md reproduces the hourly figures.

mod common;

use std::path::PathBuf;
use std::process::Command;

use serde_json::Value;

fn here(path: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(path)
}

fn soak() -> bool {
    std::env::var_os("POSTERIORD_SOAK").is_some()
}

fn plan() -> Value {
    let (sims, step) = if soak() {
        ("1000", "3600")
    } else {
        ("200", "86400")
    };
    let out = Command::new(common::bin())
        .arg("plan")
        .arg("--config")
        .arg(here("tests/plan/tidewater-seat-map.toml"))
        .args([
            "--experiment",
            "tidewater-seat-map",
            "--units-per-day",
            "4000",
            "--days",
            "21",
            "--baseline",
            "booking=0.05",
            "--baseline",
            "payment-failure=0.02",
            "--effect",
            "seat-map=+20%",
            "--effect",
            "seat-map:payment-failure=+50%",
            "--sims",
            sims,
            "--step-secs",
            step,
            "--seed",
            "17",
            "--json",
        ])
        .output()
        .expect("run posteriord plan");
    assert!(
        out.status.success(),
        "plan failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).expect("plan --json prints JSON")
}

fn share(scenario: &Value, ending: &str) -> f64 {
    scenario["outcomes"][ending]["share"].as_f64().unwrap()
}

/// `measured` is within `target` up to 3 Monte Carlo standard errors of the target itself.
fn at_most(what: &str, measured: f64, target: f64, runs: f64) {
    let se = (target * (1.0 - target) / runs).sqrt();
    assert!(
        measured <= target + 3.0 * se,
        "{what}: {measured:.4} > target {target} (+3 se = {:.4})",
        target + 3.0 * se
    );
}

#[test]
fn the_default_rules_keep_wrong_calls_rare_on_a_realistic_plan() {
    let doc = plan();
    let scenarios = doc["scenarios"].as_array().unwrap();
    let (aa, better, guard) = (&scenarios[0], &scenarios[1], &scenarios[2]);
    let runs = aa["runs"].as_f64().unwrap();
    for s in scenarios {
        eprintln!(
            "{}: false ship {:.4}, true ship {:.4}, control shipped {:.4}, harm {:.4}, equivalent {:.4}, inconclusive {:.4}; wrong-way ship {:.4}, false harm {:.4}; anytime harm alarm {:.4} (median {} d); flags {}",
            s["scenario"],
            share(s, "false_ship"),
            share(s, "true_ship"),
            share(s, "control_shipped"),
            share(s, "harm"),
            share(s, "equivalent"),
            share(s, "inconclusive"),
            s["wrong_ship"]["share"],
            s["false_harm"]["share"],
            s["anytime_harm"]["alarm"]["share"],
            s["anytime_harm"]["days_to_alarm"]["median"],
            s["flags"],
        );
    }
    assert_eq!(guard["scenario"], "seat-map:payment-failure=+50%");
    at_most(
        "guardrail 50% worse, shipped",
        share(guard, "false_ship") + share(guard, "true_ship"),
        0.05,
        runs,
    );
    at_most(
        "20% better, control shipped",
        share(better, "control_shipped"),
        0.02,
        runs,
    );
    let shipped = share(better, "true_ship");
    let se = (0.8f64 * 0.2 / runs).sqrt();
    assert!(
        shipped >= 0.8 - 3.0 * se,
        "20% better shipped in {shipped:.4} of runs, target ≥ 0.8"
    );
    at_most("A/A harm alerts", share(aa, "harm"), 0.05, runs);
    // The report counts the guardrail's harm in its own units: none can come from the A/A
    // or the better variant, and any 50%-worse ship would show as 0.01 per shipped run.
    let g = &guard["guardrail_harm_incurred"][0];
    assert_eq!(g["metric"], "payment-failure");
    let shipped_bad = share(guard, "false_ship") + share(guard, "true_ship");
    assert!(
        (g["mean"].as_f64().unwrap() - 0.01 * shipped_bad).abs() < 1e-9,
        "{g}"
    );
    assert_eq!(aa["guardrail_harm_incurred"][0]["mean"], 0.0);
}
