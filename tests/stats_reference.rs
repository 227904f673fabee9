//! Checks of the statistics core against values from outside the project: the mpmath/scipy
//! table in tests/reference/cases.json, the reference rows R1–R15 of ../shared/METHODS.md,
//! published closed forms, BDA3 worked examples; plus properties and extreme inputs.

// Reference values are copied digit for digit from their sources.
#![allow(clippy::excessive_precision)]

use std::path::PathBuf;

use proptest::prelude::*;
use serde_json::Value;

use posteriord::stats::{
    compare, sample_ratio_mismatch, ArmSummary, Arms, Beta, CompareOptions, Gamma, StatsError,
    SRM_P_THRESHOLD,
};

/// Target from the issue: 1e-9 absolute on every number.
const ABS_TOL: f64 = 1e-9;
/// Extra target for expected losses, which are often tiny: 1e-6 relative.
const LOSS_REL_TOL: f64 = 1e-6;

fn beta(a: f64, b: f64) -> Beta {
    Beta::new(a, b).expect("valid beta")
}

fn gamma(a: f64, r: f64) -> Gamma {
    Gamma::new(a, r).expect("valid gamma")
}

thread_local! {
    /// Largest error seen per quantity (scaled as its tolerance is), printed by the table
    /// test for docs/methods.md §5 (`cargo test --test stats_reference -- --nocapture`).
    static WORST: std::cell::RefCell<std::collections::BTreeMap<String, (f64, String)>> =
        Default::default();
}

fn check_abs(what: &str, got: f64, want: f64, tol: f64) {
    let quantity = what.rsplit(' ').next().unwrap_or(what).to_string();
    let scaled = (got - want).abs() * (ABS_TOL / tol);
    WORST.with(|w| {
        let mut w = w.borrow_mut();
        let e = w.entry(quantity).or_insert((0.0, String::new()));
        if scaled > e.0 {
            *e = (scaled, what.to_string());
        }
    });
    assert!(
        (got - want).abs() <= tol,
        "{what}: got {got:.17e}, want {want:.17e} (error {:.2e} > {tol:.0e})",
        got - want
    );
}

fn check_loss(what: &str, got: f64, want: f64) {
    check_abs(what, got, want, ABS_TOL);
    // Below 1e-15 the relative criterion is meaningless in double precision sums.
    if want.abs() > 1e-15 {
        let rel = ((got - want) / want).abs();
        assert!(
            rel <= LOSS_REL_TOL,
            "{what}: got {got:.17e}, want {want:.17e} (relative {rel:.2e})"
        );
    }
}

fn compare_with(arms: Arms, control: usize) -> Vec<ArmSummary> {
    compare(
        &arms,
        &CompareOptions {
            control,
            ..CompareOptions::default()
        },
    )
    .expect("compare")
}

// ---------------------------------------------------------------------------------------------
// The committed table (tests/reference/generate.py, mpmath at 40 digits or scipy for n ≥ 1e8).

fn load_cases() -> Vec<Value> {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/cases.json");
    let text = std::fs::read_to_string(&path).expect("tests/reference/cases.json is committed");
    let doc: Value = serde_json::from_str(&text).expect("valid JSON");
    doc["cases"].as_array().expect("cases array").clone()
}

fn arms_of(case: &Value) -> Arms {
    let params: Vec<(f64, f64)> = case["params"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap()))
        .collect();
    match case["metric"].as_str().unwrap() {
        "conversion" => Arms::Beta(params.iter().map(|&(a, b)| beta(a, b)).collect()),
        _ => Arms::Gamma(params.iter().map(|&(a, r)| gamma(a, r)).collect()),
    }
}

#[test]
fn every_case_of_the_reference_table_is_within_tolerance() {
    let cases = load_cases();
    assert!(
        cases.len() >= 10,
        "the table should hold the generated cases"
    );
    for case in &cases {
        let id = case["id"].as_str().unwrap();
        let opts = CompareOptions {
            control: case["control"].as_u64().unwrap() as usize,
            level: case["level"].as_f64().unwrap(),
            rope: case["rope"].as_f64().unwrap(),
            harm_margin: case["harm_margin"].as_f64().unwrap(),
            ..CompareOptions::default()
        };
        let got = compare(&arms_of(case), &opts).unwrap_or_else(|e| panic!("{id}: {e}"));
        let expect = &case["expect"];
        for (j, s) in got.iter().enumerate() {
            let at = |key: &str| &expect[key][j];
            check_abs(
                &format!("{id}[{j}] prob_best"),
                s.prob_best,
                at("prob_best").as_f64().unwrap(),
                ABS_TOL,
            );
            // Defect-rate losses are in rate units, which may be large (5e7 per 1k in
            // "sep_exposure_1e9"): 1e-9 absolute plus 1e-9 relative there.
            let want_loss = at("expected_loss").as_f64().unwrap();
            if want_loss.abs() > 1.0 {
                check_abs(
                    &format!("{id}[{j}] expected_loss"),
                    s.expected_loss,
                    want_loss,
                    ABS_TOL * want_loss.abs(),
                );
            } else {
                check_loss(
                    &format!("{id}[{j}] expected_loss"),
                    s.expected_loss,
                    want_loss,
                );
            }
            let interval = at("interval");
            for (end, got, want) in [
                ("lower", s.interval.lower, interval[0].as_f64().unwrap()),
                ("upper", s.interval.upper, interval[1].as_f64().unwrap()),
            ] {
                check_abs(
                    &format!("{id}[{j}] interval.{end}"),
                    got,
                    want,
                    ABS_TOL * want.abs().max(1.0),
                );
            }
            if j == opts.control {
                assert!(
                    s.prob_better_than_control.is_none() && s.lift.is_none(),
                    "{id}: control has no comparison"
                );
                continue;
            }
            check_abs(
                &format!("{id}[{j}] prob_better_than_control"),
                s.prob_better_than_control.unwrap(),
                at("prob_better_than_control").as_f64().unwrap(),
                ABS_TOL,
            );
            let lift = s.lift.unwrap();
            match at("lift_mean").as_f64() {
                Some(m) => check_abs(
                    &format!("{id}[{j}] lift.mean"),
                    lift.mean,
                    m,
                    ABS_TOL * m.abs().max(1.0),
                ),
                None => assert!(
                    lift.mean.is_infinite(),
                    "{id}[{j}]: lift mean should diverge"
                ),
            }
            let li = at("lift_interval");
            for (end, got, want) in [
                ("lower", lift.interval.lower, &li[0]),
                ("upper", lift.interval.upper, &li[1]),
            ] {
                match want.as_f64() {
                    // 1e-9 absolute, or relative where the lift is itself large (a ratio of
                    // rates 1e13 apart, "sep_exposure_1e9").
                    Some(w) => check_abs(
                        &format!("{id}[{j}] lift.{end}"),
                        got,
                        w,
                        ABS_TOL * w.abs().max(1.0),
                    ),
                    // The generator writes null for an end beyond double range (e^1000).
                    None => assert!(
                        got > 1e300,
                        "{id}[{j}] lift.{end}: got {got}, want beyond double range"
                    ),
                }
            }
            check_abs(
                &format!("{id}[{j}] prob_practically_equivalent"),
                s.prob_practically_equivalent.unwrap(),
                at("prob_practically_equivalent").as_f64().unwrap(),
                ABS_TOL,
            );
            check_abs(
                &format!("{id}[{j}] prob_harm"),
                s.prob_harm.unwrap(),
                at("prob_harm").as_f64().unwrap(),
                ABS_TOL,
            );
        }
    }
    WORST.with(|w| {
        for (quantity, (err, at)) in w.borrow().iter() {
            eprintln!("worst {quantity}: {err:.1e} (at {at})");
        }
    });
}

// ---------------------------------------------------------------------------------------------
// Rows of ../shared/METHODS.md §2 (mpmath at 40 digits unless the row says otherwise).

#[test]
fn methods_rows_r1_to_r3_hand_checkable() {
    // R1: P(Beta(2,1) > Beta(1,1)) = 2/3.
    let r = compare_with(Arms::Beta(vec![beta(1.0, 1.0), beta(2.0, 1.0)]), 0);
    check_abs(
        "R1",
        r[1].prob_better_than_control.unwrap(),
        2.0 / 3.0,
        1e-12,
    );
    // R2: E[(U1 − U2)⁺] = 1/6 for two uniforms.
    let r = compare_with(Arms::Beta(vec![beta(1.0, 1.0), beta(1.0, 1.0)]), 0);
    check_loss("R2", r[0].expected_loss, 1.0 / 6.0);
    check_abs("R2 symmetry", r[0].prob_best, 0.5, 1e-12);
    // R3: P(λ_B > λ_A) = 1/3 for Gamma(1, r=2) vs Gamma(1, r=1): B beats A (lower) w.p. 2/3.
    let r = compare_with(Arms::Gamma(vec![gamma(1.0, 1.0), gamma(1.0, 2.0)]), 0);
    check_abs(
        "R3",
        1.0 - r[1].prob_better_than_control.unwrap(),
        1.0 / 3.0,
        1e-12,
    );
}

#[test]
fn methods_rows_r4_to_r9_pairwise_conversion() {
    // R4/R5: A 10/100, B 15/100.
    let r = compare_with(Arms::Beta(vec![beta(11.0, 91.0), beta(16.0, 86.0)]), 0);
    check_abs(
        "R4",
        r[1].prob_better_than_control.unwrap(),
        0.853283789933966131699395604811,
        ABS_TOL,
    );
    check_loss("R5 ship A", r[0].expected_loss, 0.0525976959738483);
    check_loss("R5 ship B", r[1].expected_loss, 0.00357808813071105);
    // R6/R6b: BDA3 Exercise 3.4 beta-blockers, deaths (lower is better for the patient, but
    // the row is stated as P(p_t < p_c), i.e. 1 − P(p_t > p_c)).
    let r = compare_with(Arms::Beta(vec![beta(40.0, 636.0), beta(23.0, 659.0)]), 0);
    check_abs(
        "R6",
        1.0 - r[1].prob_better_than_control.unwrap(),
        0.987979262061270571574609904477,
        ABS_TOL,
    );
    let lift = r[1].lift.unwrap().interval;
    // R6b is printed to 10 digits.
    check_abs("R6b lower", 1.0 + lift.lower, 0.3368608044, 1e-10);
    check_abs("R6b upper", 1.0 + lift.upper, 0.9289105516, 1e-10);
    // R7/R8: 1e6 per arm.
    let r = compare_with(
        Arms::Beta(vec![beta(10001.0, 990001.0), beta(10201.0, 989801.0)]),
        0,
    );
    check_abs(
        "R7",
        r[1].prob_better_than_control.unwrap(),
        0.921367010302931650140052544202,
        ABS_TOL,
    );
    check_loss("R8 ship A", r[0].expected_loss, 2.05023550626071e-4);
    check_loss("R8 ship B", r[1].expected_loss, 5.02395062527072e-6);
    // R9: 1e8 per arm, harm direction.
    let r = compare_with(
        Arms::Beta(vec![
            beta(1000001.0, 99000001.0),
            beta(999001.0, 99001001.0),
        ]),
        0,
    );
    check_abs(
        "R9",
        1.0 - r[1].prob_better_than_control.unwrap(),
        0.761409793185604918241167522782,
        ABS_TOL,
    );
    // R9c: 1e9 per arm, where R9d shows naive f64 log densities miss by 3.8e-11 absolute.
    let r = compare_with(
        Arms::Beta(vec![
            beta(10000001.0, 990000001.0),
            beta(10010001.0, 989990001.0),
        ]),
        0,
    );
    check_abs(
        "R9c",
        1.0 - r[1].prob_better_than_control.unwrap(),
        0.0123271441466721623441890242664,
        1e-12,
    );
}

#[test]
fn methods_rows_r10_r11_k_arms() {
    // R10/R10b: three conversion arms (values printed to 12 digits).
    let r = compare_with(
        Arms::Beta(vec![
            beta(101.0, 901.0),
            beta(121.0, 881.0),
            beta(111.0, 891.0),
        ]),
        0,
    );
    let best = [0.0462083149893, 0.726886497833, 0.226905187178];
    let loss = [0.0222527306093, 0.00229265076902, 0.0122726906892];
    for j in 0..3 {
        check_abs(&format!("R10[{j}]"), r[j].prob_best, best[j], 1e-12);
        check_abs(&format!("R10b[{j}]"), r[j].expected_loss, loss[j], 1e-12);
    }
    // R11/R11c–f: defect rates, lower is better.
    let g = [gamma(51.0, 101.0), gamma(41.0, 101.0), gamma(46.0, 101.0)];
    let r = compare_with(Arms::Gamma(g[..2].to_vec()), 0);
    check_abs(
        "R11",
        r[1].prob_better_than_control.unwrap(),
        0.852765107715733458042786438143,
        ABS_TOL,
    );
    check_loss("R11c ship B", r[1].expected_loss, 0.00720973082113806);
    check_loss("R11c ship A", r[0].expected_loss, 0.106219631811237);
    let lift = r[1].lift.unwrap().interval;
    check_abs("R11f lower", 1.0 + lift.lower, 0.529041749783, 1e-11);
    check_abs("R11f upper", 1.0 + lift.upper, 1.21017879534, 1e-11);
    let r = compare_with(Arms::Gamma(g.to_vec()), 0);
    let best = [0.0896482659681, 0.64848169356, 0.261870040471];
    let loss = [0.119577883754, 0.0205679827639, 0.070072933259];
    for j in 0..3 {
        check_abs(&format!("R11d[{j}]"), r[j].prob_best, best[j], 1e-11);
        check_abs(&format!("R11e[{j}]"), r[j].expected_loss, loss[j], 1e-11);
    }
    // R12: large Gamma shapes, 1e6 events.
    let r = compare_with(
        Arms::Gamma(vec![
            gamma(1000001.0, 1e6 + 1.0),
            gamma(1001001.0, 1e6 + 1.0),
        ]),
        0,
    );
    check_abs(
        "R12",
        1.0 - r[1].prob_better_than_control.unwrap(),
        0.76019497268719020329383189671,
        ABS_TOL,
    );
}

#[test]
fn methods_rows_r13_r15_intervals_and_tails() {
    // R13 (BDA3 §2.4), values printed to 10 digits.
    let d = beta(438.0, 544.0);
    let i = d.interval(0.95).unwrap();
    check_abs("R13 2.5%", i.lower, 0.4150654925, 1e-10);
    check_abs("R13 97.5%", i.upper, 0.4771997706, 1e-10);
    check_abs("R13 median", d.quantile(0.5).unwrap(), 0.4459918579, 1e-10);
    // R15: mean, sd, P(θ < 0.485).
    check_abs("R15 mean", d.mean(), 0.4460285132, 1e-10);
    check_abs("R15 sd", d.sd(), 0.01585434332, 1e-11);
    check_abs("R15 cdf", d.cdf(0.485), 0.9928259886, 1e-10);
    check_abs("R15 sf", d.sf(0.485), 1.0 - 0.9928259886, 1e-10);
    // R13b: 1e6 trials.
    let i = beta(10001.0, 990001.0).interval(0.95).unwrap();
    check_abs("R13b 2.5%", i.lower, 0.00980688677798, 1e-14);
    check_abs("R13b 97.5%", i.upper, 0.0101969296176, 1e-13);
    // R13c/R13d (BDA3 §2.6 asthma mortality).
    check_abs("R13c mean", gamma(6.0, 7.0).mean(), 0.8571428571, 1e-10);
    check_abs("R13c P(>1)", gamma(6.0, 7.0).sf(1.0), 0.3007082762, 1e-10);
    check_abs("R13d P(>1)", gamma(33.0, 25.0).sf(1.0), 0.9285439688, 1e-10);
    check_abs(
        "R13d prior 97.5%",
        gamma(3.0, 5.0).quantile(0.975).unwrap(),
        1.444937534,
        1e-9,
    );
    // R13e.
    let i = gamma(46.0, 101.0).interval(0.95).unwrap();
    check_abs("R13e 2.5%", i.lower, 0.333443380287, 1e-12);
    check_abs("R13e 97.5%", i.upper, 0.596173668287, 1e-12);
}

#[test]
fn methods_rows_r14_sample_ratio_mismatch() {
    // R14: 821,588 vs 815,482 in a 50/50 design (Kohavi, Tang & Xu 2020, as quoted in METHODS).
    let s = sample_ratio_mismatch(&[821588, 815482], &[0.5, 0.5]).unwrap();
    check_abs("R14 chi2", s.chi2, 22.77436884, 1e-8);
    assert!(
        ((s.p_value - 1.821792873e-6) / 1.821792873e-6).abs() < 1e-9,
        "R14 p = {}",
        s.p_value
    );
    assert_eq!(s.df, 1);
    assert!(s.is_mismatch());
    // R14b: χ²(2) survival is exactly e^{−x/2}.
    let s = sample_ratio_mismatch(&[50500, 24700, 24800], &[50.0, 25.0, 25.0]).unwrap();
    check_abs("R14b chi2", s.chi2, 10.2, 1e-12);
    check_abs("R14b p", s.p_value, (-5.1f64).exp(), 1e-15);
    assert!(!s.is_mismatch() && s.p_value > SRM_P_THRESHOLD);
    // A perfect split has X² = 0 and p = 1.
    let s = sample_ratio_mismatch(&[500, 500], &[1.0, 1.0]).unwrap();
    assert_eq!((s.chi2, s.p_value), (0.0, 1.0));
}

// ---------------------------------------------------------------------------------------------
// Published closed forms cross-checked against the quadrature.

/// Miller (2015) / Cook (2005): for integer α_B,
/// P(p_B > p_A) = Σ_{i=0}^{α_B−1} B(α_A+i, β_A+β_B) / ((β_B+i) B(1+i, β_B) B(α_A, β_A)).
/// Terms in log space via statrs ln_beta; its ~1e-15 relative error on ln B ≈ −700 makes the
/// f64 sum itself good to ~1e-11 only (measured 1.1e-11 at α ≈ 250), hence the 5e-11
/// tolerance below; the same sum in mpmath at 40 digits is checked to 1e-14.
fn miller_beta_sum(a_b: u32, b_b: f64, a_a: f64, b_a: f64) -> f64 {
    use statrs::function::beta::ln_beta;
    (0..a_b)
        .map(|i| {
            let i = f64::from(i);
            (ln_beta(a_a + i, b_a + b_b)
                - (b_b + i).ln()
                - ln_beta(1.0 + i, b_b)
                - ln_beta(a_a, b_a))
            .exp()
        })
        .sum()
}

/// Miller (2014), count data: P(λ1 > λ2) = Σ_{k=0}^{α1−1} (β1+β2)^{−(k+α2)} β1^k β2^{α2} /
/// ((k+α2) B(k+1, α2)), β = rate, integer α1.
fn miller_gamma_sum(a1: u32, r1: f64, a2: f64, r2: f64) -> f64 {
    use statrs::function::beta::ln_beta;
    (0..a1)
        .map(|k| {
            let k = f64::from(k);
            (-(k + a2) * (r1 + r2).ln() + k * r1.ln() + a2 * r2.ln()
                - (k + a2).ln()
                - ln_beta(k + 1.0, a2))
            .exp()
        })
        .sum()
}

#[test]
fn closed_form_beta_sum_agrees_with_quadrature() {
    // Invented app-store cases (installs per page view), integer posteriors.
    let cases = [
        (3u32, 40.0, 5.0, 30.0),
        (57, 950.0, 49.0, 960.0),
        (250, 4750.0, 240.0, 4760.0),
        (1, 1.0, 1.0, 1.0),
    ];
    for (a_b, b_b, a_a, b_a) in cases {
        let want = miller_beta_sum(a_b, b_b, a_a, b_a);
        let r = compare_with(
            Arms::Beta(vec![beta(a_a, b_a), beta(f64::from(a_b), b_b)]),
            0,
        );
        check_abs(
            &format!("Miller sum {a_b},{b_b} vs {a_a},{b_a}"),
            r[1].prob_better_than_control.unwrap(),
            want,
            5e-11,
        );
    }
    // The same sum for Beta(250, 4750) vs Beta(240, 4760) evaluated by mpmath (40 digits,
    // computed for this test): 0.67854755174943573735986731951885801919.
    let r = compare_with(
        Arms::Beta(vec![beta(240.0, 4760.0), beta(250.0, 4750.0)]),
        0,
    );
    check_abs(
        "Miller sum, mpmath",
        r[1].prob_better_than_control.unwrap(),
        0.678_547_551_749_435_737_4,
        1e-14,
    );
}

#[test]
fn closed_form_gamma_identities_agree_with_quadrature() {
    // P(λ_v > c·λ_c) = I_{r_c/(r_c + c·r_v)}(α_c, α_v) (METHODS §1.2), evaluated with our Beta
    // CDF (a separate code path from the pairwise quadrature), and Miller's count-data sum.
    let cases = [
        (12.0, 30.5, 7.0, 29.0),
        (3.0, 2.0, 9.0, 4.5),
        (401.0, 1000.0, 380.0, 1001.0),
    ];
    for (a_c, r_c, a_v, r_v) in cases {
        let r = compare_with(Arms::Gamma(vec![gamma(a_c, r_c), gamma(a_v, r_v)]), 0);
        // beats = P(λ_v < λ_c) = 1 − P(λ_v > λ_c) = 1 − I_{r_c/(r_c+r_v)}(α_c, α_v).
        let x = r_c / (r_c + r_v);
        let exact = beta(a_c, a_v).sf(x);
        check_abs(
            "Gamma closed form",
            r[1].prob_better_than_control.unwrap(),
            exact,
            1e-12,
        );
        let miller = miller_gamma_sum(a_c as u32, r_c, a_v, r_v);
        check_abs(
            "Miller count sum",
            r[1].prob_better_than_control.unwrap(),
            miller,
            1e-11,
        );
        // Harm with a margin m: P(λ_v > (1+m)λ_c) = I_{r_c/(r_c+(1+m)r_v)}(α_c, α_v).
        let m = 0.05;
        let opts = CompareOptions {
            harm_margin: m,
            ..CompareOptions::default()
        };
        let r = compare(&Arms::Gamma(vec![gamma(a_c, r_c), gamma(a_v, r_v)]), &opts).unwrap();
        let harm = beta(a_c, a_v).cdf(r_c / (r_c + (1.0 + m) * r_v));
        check_abs(
            "Gamma harm closed form",
            r[1].prob_harm.unwrap(),
            harm,
            1e-12,
        );
    }
}

// ---------------------------------------------------------------------------------------------
// Textbook worked examples: Gelman et al., Bayesian Data Analysis, 3rd ed. (CRC 2013).

#[test]
fn bda3_placenta_previa_section_2_4() {
    // 437 girls of 980 births, uniform prior: mean 0.446, sd 0.016, central 95% [0.415, 0.477]
    // (book, 3 decimals).
    let post = Beta::posterior(&beta(1.0, 1.0), 980, 437).unwrap();
    assert_eq!((post.alpha(), post.beta()), (438.0, 544.0));
    check_abs("BDA3 mean", post.mean(), 0.446, 5e-4);
    check_abs("BDA3 sd", post.sd(), 0.016, 5e-4);
    let i = post.interval(0.95).unwrap();
    check_abs("BDA3 2.5%", i.lower, 0.415, 5e-4);
    check_abs("BDA3 97.5%", i.upper, 0.477, 5e-4);
    // Table 2.1, prior mean 0.485 with prior size 100: posterior median 0.450, 95% [0.420, 0.479].
    let post = Beta::posterior(&beta(48.5, 51.5), 980, 437).unwrap();
    check_abs("BDA3 T2.1 median", post.quantile(0.5).unwrap(), 0.450, 5e-4);
    let i = post.interval(0.95).unwrap();
    check_abs("BDA3 T2.1 2.5%", i.lower, 0.420, 5e-4);
    check_abs("BDA3 T2.1 97.5%", i.upper, 0.479, 5e-4);
}

#[test]
fn bda3_asthma_mortality_section_2_6() {
    // Prior Gamma(3, 5); 3 deaths in exposure 2.0 → Gamma(6, 7): mean 0.86, P(θ > 1) = 0.30;
    // 30 deaths in 20 → Gamma(33, 25): mean 1.32, P(θ > 1) = 0.93 (book, 2 decimals).
    let prior = gamma(3.0, 5.0);
    let post = Gamma::posterior(&prior, 3, 2.0).unwrap();
    check_abs("BDA3 mean", post.mean(), 0.86, 5e-3);
    check_abs("BDA3 P(>1)", post.sf(1.0), 0.30, 5e-3);
    let post = Gamma::posterior(&prior, 30, 20.0).unwrap();
    check_abs("BDA3 mean 10y", post.mean(), 1.32, 5e-3);
    check_abs("BDA3 P(>1) 10y", post.sf(1.0), 0.93, 5e-3);
}

// ---------------------------------------------------------------------------------------------
// Where statrs is not accurate enough (why grid.rs exists).

#[test]
fn statrs_incomplete_functions_fail_at_large_counts_where_ours_hold() {
    use statrs::function::beta::beta_reg;
    use statrs::function::gamma::gamma_ur;
    // P(λ > 1.0001) for Gamma(1e9, 1e9): mpmath.gammainc at 30 digits gives
    // 7.82956161958326824e-4 (computed for this test).
    let want = 7.829_561_619_583_268e-4;
    let ours = gamma(1e9, 1e9).sf(1.0001);
    assert!(((ours - want) / want).abs() < 1e-9, "ours {ours}");
    let theirs = gamma_ur(1e9, 1.0001e9);
    assert!(
        ((theirs - want) / want).abs() > 1e-6,
        "statrs unexpectedly accurate: {theirs}"
    );
    // P(θ > 0.01001) for Beta(1e7+1, 9.9e8+1): scipy.special.betaincc (Boost) gives
    // 7.441559100164576e-4 (~1e-12 relative at this size, METHODS §1.5).
    let want = 7.441_559_100_164_576e-4;
    let ours = beta(1e7 + 1.0, 9.9e8 + 1.0).sf(0.01001);
    assert!(((ours - want) / want).abs() < 1e-8, "ours {ours}");
    let theirs = 1.0 - beta_reg(1e7 + 1.0, 9.9e8 + 1.0, 0.01001);
    assert!(
        ((theirs - want) / want).abs() > 1e-6,
        "statrs unexpectedly accurate: {theirs}"
    );
}

// ---------------------------------------------------------------------------------------------
// Extreme inputs.

#[test]
fn bad_parameters_are_errors_not_panics() {
    for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, -1.0, 0.0] {
        assert!(
            matches!(
                Beta::new(bad, 1.0),
                Err(StatsError::InvalidParameter { .. })
            ),
            "{bad}"
        );
        assert!(
            matches!(
                Beta::new(1.0, bad),
                Err(StatsError::InvalidParameter { .. })
            ),
            "{bad}"
        );
        assert!(
            matches!(
                Gamma::new(bad, 1.0),
                Err(StatsError::InvalidParameter { .. })
            ),
            "{bad}"
        );
        assert!(
            matches!(
                Gamma::new(1.0, bad),
                Err(StatsError::InvalidParameter { .. })
            ),
            "{bad}"
        );
    }
    assert!(matches!(
        Beta::new(1e14, 1.0),
        Err(StatsError::ParameterOutOfRange { .. })
    ));
    assert!(Beta::posterior(&beta(1.0, 1.0), 10, 11).is_err());
    assert!(Gamma::posterior(&gamma(1.0, 1.0), 1, -1.0).is_err());
    assert!(Gamma::posterior(&gamma(1.0, 1.0), 1, f64::NAN).is_err());
    let d = beta(2.0, 3.0);
    for bad in [f64::NAN, -0.1, 1.1] {
        assert!(d.quantile(bad).is_err());
        assert!(gamma(2.0, 1.0).quantile(bad).is_err());
    }
    for bad in [f64::NAN, 0.0, 1.0, -0.5, 1.5] {
        assert!(d.interval(bad).is_err());
    }
    let two = Arms::Beta(vec![beta(1.0, 1.0), beta(2.0, 2.0)]);
    let base = CompareOptions::default();
    for opts in [
        CompareOptions { control: 2, ..base },
        CompareOptions {
            level: f64::NAN,
            ..base
        },
        CompareOptions { level: 1.0, ..base },
        CompareOptions { rope: -0.1, ..base },
        CompareOptions {
            rope: f64::INFINITY,
            ..base
        },
        CompareOptions {
            harm_margin: f64::NAN,
            ..base
        },
    ] {
        assert!(compare(&two, &opts).is_err(), "{opts:?}");
    }
    assert!(matches!(
        compare(&Arms::Beta(vec![beta(1.0, 1.0)]), &base),
        Err(StatsError::ArmCount(1))
    ));
    assert!(compare(&Arms::Beta(vec![beta(1.0, 1.0); 65]), &base).is_err());
    assert!(sample_ratio_mismatch(&[1, 2], &[1.0]).is_err());
    assert!(sample_ratio_mismatch(&[1, 2], &[1.0, f64::NAN]).is_err());
    assert!(sample_ratio_mismatch(&[1, 2], &[1.0, -1.0]).is_err());
    assert!(sample_ratio_mismatch(&[0, 0], &[1.0, 1.0]).is_err());
    assert!(d.cdf(f64::NAN).is_nan() && d.pdf(f64::NAN).is_nan());
}

#[test]
fn no_data_and_boundary_counts() {
    let prior = beta(1.0, 1.0);
    let none = Beta::posterior(&prior, 0, 0).unwrap();
    let zero = Beta::posterior(&prior, 50, 0).unwrap();
    let all = Beta::posterior(&prior, 50, 50).unwrap();
    // Closed forms: Beta(1, 51) has CDF 1 − (1−x)^51, Beta(51, 1) has CDF x^51.
    check_abs("s = 0 cdf", zero.cdf(0.02), 1.0 - 0.98f64.powi(51), 1e-14);
    check_abs("s = n cdf", all.cdf(0.98), 0.98f64.powi(51), 1e-14);
    check_abs(
        "s = 0 median",
        zero.quantile(0.5).unwrap(),
        1.0 - 0.5f64.powf(1.0 / 51.0),
        1e-14,
    );
    let r = compare_with(Arms::Beta(vec![none, zero, all]), 0);
    let total: f64 = r.iter().map(|s| s.prob_best).sum();
    check_abs("sum", total, 1.0, 1e-12);
    // P(Beta(51,1) > U) = ∫ x dF = ∫ 51 x^51 dx = 51/52 against the uniform control.
    check_abs(
        "s = n beats uniform",
        r[2].prob_better_than_control.unwrap(),
        51.0 / 52.0,
        1e-12,
    );
    // P(Beta(1,51) > U) = ∫ 51(1−x)^50 x dx = 1/52.
    check_abs(
        "s = 0 beats uniform",
        r[1].prob_better_than_control.unwrap(),
        1.0 / 52.0,
        1e-12,
    );
    // The uniform control has E[1/θ] = ∞, so the lift mean diverges but its interval exists.
    let lift = r[2].lift.unwrap();
    assert!(
        lift.mean.is_infinite()
            && lift.interval.lower.is_finite()
            && lift.interval.upper.is_finite()
    );
}

#[test]
fn extreme_priors_and_counts_stay_finite_and_consistent() {
    // Prior Beta(1e-3, 1e-3) with no data puts most mass within 1e-100 of 0 or 1; the symmetry
    // still fixes P(best) = 1/2 and E[loss] = E[|X − Y|]/2 for the identical pair.
    let tiny = beta(1e-3, 1e-3);
    let r = compare_with(Arms::Beta(vec![tiny, tiny]), 0);
    check_abs("tiny prior symmetry", r[0].prob_best, 0.5, 1e-9);
    check_abs(
        "tiny prior beats",
        r[1].prob_better_than_control.unwrap(),
        0.5,
        1e-9,
    );
    assert!((r[0].expected_loss - r[1].expected_loss).abs() < 1e-12);
    // Beta(a, a): E|X − Y| for independent copies; with a → 0 the mass sits at 0 and 1 and
    // E|X−Y| → 1/2, so the loss approaches 1/4 (here a = 1e-3: slightly below).
    assert!(
        r[0].expected_loss > 0.24 && r[0].expected_loss < 0.25,
        "{}",
        r[0].expected_loss
    );
    // Prior Beta(1e6, 1e6) and n = 1e9 in the other arm.
    let strong = beta(1e6, 1e6);
    let huge = Beta::posterior(&beta(1.0, 1.0), 1_000_000_000, 500_010_000).unwrap();
    let r = compare_with(Arms::Beta(vec![strong, huge]), 0);
    for s in &r {
        assert!(
            s.prob_best.is_finite()
                && s.expected_loss >= 0.0
                && s.interval.lower < s.interval.upper
        );
    }
    // Normal approximation for this well-separated-scale pair (METHODS §1.5 point 5: ~1e-7 at
    // these sizes): P(huge > strong) = Φ((μ_h − μ_s)/√(σ_h² + σ_s²)).
    let z = (huge.mean() - strong.mean()) / (huge.sd().powi(2) + strong.sd().powi(2)).sqrt();
    let normal = 0.5 * statrs::function::erf::erfc(-z / std::f64::consts::SQRT_2);
    check_abs(
        "1e9 vs prior 1e6, normal check",
        r[1].prob_better_than_control.unwrap(),
        normal,
        1e-5,
    );
    // Gamma with a tiny prior and no events.
    let g = Gamma::posterior(&gamma(1e-3, 1e-3), 0, 10.0).unwrap();
    let r = compare_with(Arms::Gamma(vec![g, gamma(2.0, 10.0)]), 0);
    check_abs(
        "gamma tiny sum",
        r[0].prob_best + r[1].prob_best,
        1.0,
        1e-10,
    );
}

#[test]
fn non_overlapping_posteriors_give_certainty_and_exact_gap_loss() {
    // 100/1000 vs 300/1000: P(B > A) = 1 to double precision; the loss of shipping A is the
    // mean gap E[p_B − p_A] = μ_B − μ_A exactly (no overlap), that of shipping B ≈ 0.
    let (a, b) = (beta(101.0, 901.0), beta(301.0, 701.0));
    let r = compare_with(Arms::Beta(vec![a, b]), 0);
    check_abs(
        "certain",
        r[1].prob_better_than_control.unwrap(),
        1.0,
        1e-15,
    );
    check_abs("prob_best", r[1].prob_best, 1.0, 1e-15);
    check_loss("gap", r[0].expected_loss, b.mean() - a.mean());
    assert!(r[1].expected_loss < 1e-30, "{}", r[1].expected_loss);
    // The true value is ~e^-100; the ratio quadrature resolves probabilities to ~1e-16.
    assert!(
        r[1].prob_harm.unwrap() < 1e-14,
        "{}",
        r[1].prob_harm.unwrap()
    );
}

#[test]
fn sixty_four_identical_arms_share_everything() {
    let arm = beta(1201.0, 98801.0);
    let r = compare_with(Arms::Beta(vec![arm; 64]), 0);
    let first = r[0].expected_loss;
    for s in &r {
        check_abs("1/64", s.prob_best, 1.0 / 64.0, 1e-12);
        assert!((s.expected_loss - first).abs() <= 1e-12 * first);
    }
    for s in &r[1..] {
        check_abs("coin flip", s.prob_better_than_control.unwrap(), 0.5, 1e-12);
        check_abs(
            "median lift",
            s.lift.unwrap().interval.lower,
            -s.lift.unwrap().interval.upper / (1.0 + s.lift.unwrap().interval.upper),
            1e-12,
        );
    }
}

// ---------------------------------------------------------------------------------------------
// Properties.

fn arb_beta() -> impl Strategy<Value = Beta> {
    (
        0u64..5000,
        0.0f64..1.0,
        prop_oneof![Just(1.0), Just(0.5), 0.01f64..50.0],
    )
        .prop_map(|(n, frac, prior)| {
            Beta::posterior(&beta(prior, prior), n, (n as f64 * frac) as u64).unwrap()
        })
}

fn arb_gamma() -> impl Strategy<Value = Gamma> {
    (0u64..3000, 0.1f64..500.0, 0.05f64..5.0).prop_map(|(k, exposure, prior)| {
        Gamma::posterior(&gamma(prior, prior), k, exposure).unwrap()
    })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    #[test]
    fn prob_best_sums_to_one_and_losses_are_non_negative(arms in prop::collection::vec(arb_beta(), 2..6)) {
        let r = compare_with(Arms::Beta(arms), 0);
        let total: f64 = r.iter().map(|s| s.prob_best).sum();
        prop_assert!((total - 1.0).abs() < 1e-10, "sum {}", total);
        for s in &r {
            prop_assert!(s.expected_loss >= 0.0);
        }
    }

    #[test]
    fn gamma_prob_best_sums_to_one(arms in prop::collection::vec(arb_gamma(), 2..5)) {
        let r = compare_with(Arms::Gamma(arms), 0);
        let total: f64 = r.iter().map(|s| s.prob_best).sum();
        prop_assert!((total - 1.0).abs() < 1e-10, "sum {}", total);
        prop_assert!(r.iter().all(|s| s.expected_loss >= 0.0));
    }

    #[test]
    fn swapping_variants_swaps_results(a in arb_beta(), b in arb_beta(), c in arb_beta()) {
        let r1 = compare_with(Arms::Beta(vec![a, b, c]), 0);
        let r2 = compare_with(Arms::Beta(vec![a, c, b]), 0);
        for (x, y) in [(1usize, 2usize), (2, 1)] {
            prop_assert!((r1[x].prob_best - r2[y].prob_best).abs() < 1e-12);
            prop_assert!((r1[x].expected_loss - r2[y].expected_loss).abs() <= 1e-12 * r1[x].expected_loss.max(1e-300) + 1e-300);
            prop_assert!((r1[x].prob_better_than_control.unwrap() - r2[y].prob_better_than_control.unwrap()).abs() < 1e-12);
        }
    }

    #[test]
    fn more_successes_never_lower_prob_better_than_control(n in 1u64..3000, s in 0u64..3000, extra in 1u64..50, c in 0u64..3000) {
        let s = s.min(n);
        let c = c.min(n);
        let prior = beta(1.0, 1.0);
        let control = Beta::posterior(&prior, n, c).unwrap();
        let fewer = Beta::posterior(&prior, n + extra, s).unwrap();
        let more = Beta::posterior(&prior, n + extra, s + extra).unwrap();
        let p_fewer = compare_with(Arms::Beta(vec![control, fewer]), 0)[1].prob_better_than_control.unwrap();
        let p_more = compare_with(Arms::Beta(vec![control, more]), 0)[1].prob_better_than_control.unwrap();
        prop_assert!(p_more >= p_fewer - 1e-13, "{} < {}", p_more, p_fewer);
    }

    #[test]
    fn intervals_nest_as_the_level_grows(d in arb_beta(), g in arb_gamma(), lo in 0.05f64..0.9, gap in 0.01f64..0.09) {
        let hi = lo + gap;
        let (i1, i2) = (d.interval(lo).unwrap(), d.interval(hi).unwrap());
        prop_assert!(i2.lower <= i1.lower && i1.upper <= i2.upper);
        let (j1, j2) = (g.interval(lo).unwrap(), g.interval(hi).unwrap());
        prop_assert!(j2.lower <= j1.lower && j1.upper <= j2.upper);
    }
}

#[test]
fn a_certain_winner_has_zero_loss() {
    // Both losses from the same arms: the dominated arm's loss is the gap, the winner's is 0
    // (below the smallest double): this is the "0 for a variant that is best with certainty"
    // property on a deterministic case.
    let r = compare_with(
        Arms::Gamma(vec![gamma(501.0, 101.0), gamma(101.0, 101.0)]),
        0,
    );
    assert!(r[1].prob_best >= 1.0 - 1e-15, "{}", r[1].prob_best);
    assert!(r[1].expected_loss < 1e-100, "{}", r[1].expected_loss);
    assert!(r[0].expected_loss > 3.9);
}

#[test]
fn decide_matches_compare_on_the_reference_table() {
    // `decide` must report exactly what `compare` reports (same pass over the same grid), so
    // the mpmath checks on `compare` above carry over; checked here on every reference case.
    let doc: Value = serde_json::from_str(
        &std::fs::read_to_string(
            PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/cases.json"),
        )
        .expect("cases.json"),
    )
    .expect("json");
    for case in doc["cases"].as_array().unwrap() {
        let params: Vec<(f64, f64)> = case["params"]
            .as_array()
            .unwrap()
            .iter()
            .map(|p| (p[0].as_f64().unwrap(), p[1].as_f64().unwrap()))
            .collect();
        let arms = if case["metric"] == "conversion" {
            Arms::Beta(params.iter().map(|&(a, b)| beta(a, b)).collect())
        } else {
            Arms::Gamma(params.iter().map(|&(a, r)| gamma(a, r)).collect())
        };
        let control = case["control"].as_u64().unwrap() as usize;
        let full = compare_with(arms.clone(), control);
        let quick = posteriord::stats::decide(&arms, control).unwrap();
        for (s, d) in full.iter().zip(&quick) {
            assert_eq!(s.prob_best, d.prob_best, "{}", case["id"]);
            assert_eq!(s.expected_loss, d.expected_loss, "{}", case["id"]);
            assert_eq!(
                s.prob_better_than_control, d.prob_better_than_control,
                "{}",
                case["id"]
            );
        }
    }
    assert!(matches!(
        posteriord::stats::decide(&Arms::Beta(vec![beta(1.0, 1.0), beta(1.0, 1.0)]), 2),
        Err(StatsError::ControlOutOfRange { .. })
    ));
}

// ---------------------------------------------------------------------------------------------
// Defect-rate metrics of 3 and 4 arms with tiny shapes (1e-3..1e-1) and rates 1..1e9.

/// One metric of `tests/reference/gamma_many_table.in`.
struct ManyCase {
    id: &'static str,
    /// (shape, rate) of each arm's posterior.
    arms: &'static [(f64, f64)],
    control: usize,
    harm_margin: f64,
    rope: f64,
    level: f64,
    expect: &'static [ManyExpect],
}

/// The mpmath values of one arm; `None` for the control's pairwise quantities.
struct ManyExpect {
    prob_best: f64,
    expected_loss: f64,
    prob_better_than_control: Option<f64>,
    prob_harm: Option<f64>,
    prob_practically_equivalent: Option<f64>,
    /// (lower, upper) end of the lift interval; ±∞ where the end is beyond double range.
    lift: Option<(f64, f64)>,
}

/// Generated by `python3 tests/reference/gamma_many.py` (mpmath 1.3 at 50 significant
/// digits): P(better than control), harm with a margin and ROPE are mpmath.betainc of
/// Beta(a_v, a_c) at k·r_v/(r_c + k·r_v) (../shared/METHODS.md §1.2, exact); lift ends are
/// (r_c/r_v)·w/(1 − w) − 1 at the Beta quantiles, found by bisection in ln(w/(1 − w)); P(best)
/// and expected loss are mpmath.quad (tanh-sinh) of METHODS §1.4 in ln(rate), the generator
/// checking Σ P(best) = 1 and loss_i − loss_j = μ_i − μ_j to 1e-35.
const GAMMA_MANY: &[ManyCase] = include!("reference/gamma_many_table.in");

/// Relative error of a lift end; an end beyond double range must be +∞ (documented), and an
/// end that rounds to −1 in double precision must be −1 to the same rounding.
fn lift_end_error(got: f64, want: f64) -> f64 {
    if want.is_infinite() || got.is_infinite() {
        return if got == want { 0.0 } else { f64::INFINITY };
    }
    (got - want).abs() / want.abs().max(f64::MIN_POSITIVE)
}

#[test]
fn gamma_many_arms_against_mpmath() {
    // The goal of the statistics core: 1e-9 absolute on probabilities, 1e-9 relative on
    // losses (rate units) and on finite lift ends. Measured worst errors are printed with
    // `-- --nocapture` for docs/methods.md §5.
    let mut worst = [0.0f64; 6];
    let names = [
        "P(best)",
        "loss (rel)",
        "P(better)",
        "harm",
        "ROPE",
        "lift end (rel)",
    ];
    for case in GAMMA_MANY {
        let arms = Arms::Gamma(case.arms.iter().map(|&(a, r)| gamma(a, r)).collect());
        let opts = CompareOptions {
            control: case.control,
            harm_margin: case.harm_margin,
            rope: case.rope,
            level: case.level,
            ..CompareOptions::default()
        };
        let got = compare(&arms, &opts).expect("answered");
        let quick = posteriord::stats::decide(&arms, case.control).expect("answered");
        for (j, (s, want)) in got.iter().zip(case.expect).enumerate() {
            let what = |q: &str| format!("{} arm {j} {q}", case.id);
            let mut note = |k: usize, err: f64, tol: f64, q: &str, got: f64, want: f64| {
                worst[k] = worst[k].max(err);
                assert!(
                    err <= tol,
                    "{}: got {got:.17e}, want {want:.17e} (error {err:.2e} > {tol:.0e})",
                    what(q)
                );
            };
            // mpmath.quad in ln(rate), 50 digits.
            note(
                0,
                (s.prob_best - want.prob_best).abs(),
                1e-9,
                "P(best)",
                s.prob_best,
                want.prob_best,
            );
            // mpmath.quad in ln(rate), 50 digits; relative (rate units).
            let rel = (s.expected_loss - want.expected_loss).abs() / want.expected_loss;
            note(1, rel, 1e-9, "loss", s.expected_loss, want.expected_loss);
            // `decide` answers with the very numbers of `compare`.
            assert_eq!(quick[j].prob_best, s.prob_best, "{}", what("decide"));
            assert_eq!(
                quick[j].expected_loss,
                s.expected_loss,
                "{}",
                what("decide")
            );
            assert_eq!(
                quick[j].prob_better_than_control,
                s.prob_better_than_control,
                "{}",
                what("decide")
            );
            let pairs = [
                (
                    2,
                    "P(better)",
                    s.prob_better_than_control,
                    want.prob_better_than_control,
                ),
                (3, "harm", s.prob_harm, want.prob_harm),
                (
                    4,
                    "ROPE",
                    s.prob_practically_equivalent,
                    want.prob_practically_equivalent,
                ),
            ];
            for (k, q, g, w) in pairs {
                match (g, w) {
                    // mpmath.betainc of Beta(a_v, a_c), 50 digits (exact).
                    (Some(g), Some(w)) => note(k, (g - w).abs(), 1e-9, q, g, w),
                    (None, None) => {}
                    _ => panic!("{}: present in one only", what(q)),
                }
            }
            match (s.lift, want.lift) {
                // Bisection on mpmath.betainc, 50 digits.
                (Some(l), Some((lo, hi))) => {
                    let (a, b) = (l.interval.lower, l.interval.upper);
                    note(5, lift_end_error(a, lo), 1e-9, "lift lower", a, lo);
                    note(5, lift_end_error(b, hi), 1e-9, "lift upper", b, hi);
                }
                (None, None) => {}
                _ => panic!("{}: lift present in one only", what("lift")),
            }
        }
    }
    for (name, w) in names.iter().zip(worst) {
        println!("worst {name}: {w:.2e}");
    }
}
