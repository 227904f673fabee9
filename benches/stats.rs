//! Benchmarks of the statistics core: exact quadrature against a 1e5-draw Monte Carlo
//! estimator of the same decision quantities, and the cost of a full `compare` (and of the
//! P(best)/loss/P(better than control)-only `decide`) for 2..64 arms.
//!
//! Run with `cargo bench --bench stats`. Before the criterion groups it prints, from one run,
//! the speed ratio (Monte Carlo time / exact time) and the error ratio (Monte Carlo error /
//! exact error) against the mpmath reference in tests/reference/cases.json, and the same for
//! the two-arm defect-rate case R11 of METHODS §2 (mpmath), where `compare` takes the two-arm
//! fast path; `compare_general` (the shared-grid path every other input takes) is timed beside
//! it as the before. Last, defect-rate metrics of 3 to 16 arms, where `compare` takes each
//! variant's lift, ROPE and harm from the pair's exact table and `compare_general` from the
//! ratio quadrature (the before), timed in the same run.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use criterion::{black_box, criterion_group, criterion_main, BenchmarkId, Criterion};
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::Distribution;
use serde_json::Value;

use posteriord::stats::{
    compare, compare_general, decide, decide_general, Arms, Beta, CompareOptions, Gamma,
};

const MC_DRAWS: usize = 100_000;

/// The 4-arm mobile-app onboarding case of the reference table (mpmath, 40 digits).
fn reference_case() -> (Vec<Beta>, Vec<f64>, Vec<f64>) {
    let path = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/cases.json");
    let doc: Value =
        serde_json::from_str(&std::fs::read_to_string(path).expect("cases.json")).expect("json");
    let case = doc["cases"]
        .as_array()
        .unwrap()
        .iter()
        .find(|c| c["id"] == "app_onboarding_4")
        .expect("case");
    let arms = case["params"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| Beta::new(p[0].as_f64().unwrap(), p[1].as_f64().unwrap()).unwrap())
        .collect();
    let column = |k: &str| {
        case["expect"][k]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v.as_f64().unwrap())
            .collect()
    };
    (arms, column("prob_best"), column("expected_loss"))
}

/// The usual estimator: draw every arm, count winners, average the regret.
fn monte_carlo(arms: &[Beta], rng: &mut StdRng) -> (Vec<f64>, Vec<f64>) {
    let dists: Vec<rand_distr::Beta<f64>> = arms
        .iter()
        .map(|b| rand_distr::Beta::new(b.alpha(), b.beta()).unwrap())
        .collect();
    let k = arms.len();
    let mut wins = vec![0.0; k];
    let mut regret = vec![0.0; k];
    let mut draw = vec![0.0; k];
    for _ in 0..MC_DRAWS {
        for (d, x) in dists.iter().zip(draw.iter_mut()) {
            *x = d.sample(rng);
        }
        let (best, max) =
            draw.iter().enumerate().fold(
                (0, f64::MIN),
                |acc, (i, &x)| if x > acc.1 { (i, x) } else { acc },
            );
        wins[best] += 1.0;
        for j in 0..k {
            regret[j] += max - draw[j];
        }
    }
    let n = MC_DRAWS as f64;
    (
        wins.iter().map(|w| w / n).collect(),
        regret.iter().map(|r| r / n).collect(),
    )
}

fn max_error(got: &[f64], want: &[f64]) -> f64 {
    got.iter()
        .zip(want)
        .map(|(g, w)| (g - w).abs())
        .fold(0.0, f64::max)
}

fn median_time(runs: usize, mut f: impl FnMut()) -> Duration {
    let mut times: Vec<Duration> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            f();
            start.elapsed()
        })
        .collect();
    times.sort();
    times[runs / 2]
}

fn print_ratios() {
    let (arms, ref_best, ref_loss) = reference_case();
    let family = Arms::Beta(arms.clone());
    let opts = CompareOptions::default();
    let exact = compare(&family, &opts).unwrap();
    let exact_best: Vec<f64> = exact.iter().map(|s| s.prob_best).collect();
    let exact_loss: Vec<f64> = exact.iter().map(|s| s.expected_loss).collect();
    let mut rng = StdRng::seed_from_u64(20240611);
    let (mc_best, mc_loss) = monte_carlo(&arms, &mut rng);
    let t_exact = median_time(51, || {
        black_box(compare(black_box(&family), &opts).unwrap());
    });
    let t_decide = median_time(51, || {
        black_box(decide(black_box(&family), opts.control).unwrap());
    });
    let t_mc = median_time(5, || {
        black_box(monte_carlo(black_box(&arms), &mut rng));
    });
    // An exact error of 0 (agreement to the last bit) would make the ratio infinite; floor it
    // at one ulp of the largest value.
    let floor = f64::EPSILON;
    let (e_best, e_loss) = (
        max_error(&exact_best, &ref_best).max(floor),
        max_error(&exact_loss, &ref_loss).max(floor * 1e-2),
    );
    let (m_best, m_loss) = (
        max_error(&mc_best, &ref_best),
        max_error(&mc_loss, &ref_loss),
    );
    println!("statistics core, 4 arms (app_onboarding_4, reference mpmath 40 digits):");
    println!("  exact compare (all quantities incl. lift/ROPE/harm): {t_exact:?}");
    println!("  Monte Carlo, {MC_DRAWS} draws (P(best) and loss only): {t_mc:?}");
    println!(
        "  speed ratio MC/exact: {:.1}x",
        t_mc.as_secs_f64() / t_exact.as_secs_f64()
    );
    println!("  decide (P(best), loss, P(better than control) only): {t_decide:?}");
    println!(
        "  speed ratio MC/decide: {:.1}x",
        t_mc.as_secs_f64() / t_decide.as_secs_f64()
    );
    println!(
        "  P(best) max abs error: exact {e_best:.1e}, MC {m_best:.1e}, ratio {:.1e}x",
        m_best / e_best
    );
    println!(
        "  loss    max abs error: exact {e_loss:.1e}, MC {m_loss:.1e}, ratio {:.1e}x",
        m_loss / e_loss
    );
}

/// METHODS §2 R11/R11c (mpmath, 40 digits): errors per 1k requests, control 50 in 100k,
/// variant 40 in 100k → Gamma(51, 101), Gamma(41, 101); P(best) and loss of (control, variant).
#[allow(clippy::excessive_precision)]
const R11_BEST: [f64; 2] = [0.147_234_892_284_266_541_957, 0.852_765_107_715_733_458_043];
const R11_LOSS: [f64; 2] = [0.106_219_631_811_237, 0.007_209_730_821_138_06];

/// The Monte Carlo estimator for two Gamma arms (lower is better).
fn monte_carlo_gamma(arms: &[Gamma], rng: &mut StdRng) -> (Vec<f64>, Vec<f64>) {
    let dists: Vec<rand_distr::Gamma<f64>> = arms
        .iter()
        .map(|g| rand_distr::Gamma::new(g.shape(), 1.0 / g.rate()).unwrap())
        .collect();
    let (mut wins, mut regret) = ([0.0; 2], [0.0; 2]);
    for _ in 0..MC_DRAWS {
        let x = [dists[0].sample(rng), dists[1].sample(rng)];
        let min = x[0].min(x[1]);
        wins[if x[0] <= x[1] { 0 } else { 1 }] += 1.0;
        for j in 0..2 {
            regret[j] += x[j] - min;
        }
    }
    let n = MC_DRAWS as f64;
    (
        wins.iter().map(|w| w / n).collect(),
        regret.iter().map(|r| r / n).collect(),
    )
}

fn print_gamma_ratios() {
    let arms = vec![
        Gamma::new(51.0, 101.0).unwrap(),
        Gamma::new(41.0, 101.0).unwrap(),
    ];
    let family = Arms::Gamma(arms.clone());
    let opts = CompareOptions::default();
    let fast = compare(&family, &opts).unwrap();
    let general = compare_general(&family, &opts).unwrap();
    let mut rng = StdRng::seed_from_u64(20240611);
    let (mc_best, mc_loss) = monte_carlo_gamma(&arms, &mut rng);
    let t_fast = median_time(201, || {
        black_box(compare(black_box(&family), &opts).unwrap());
    });
    let t_general = median_time(51, || {
        black_box(compare_general(black_box(&family), &opts).unwrap());
    });
    let t_decide = median_time(201, || {
        black_box(decide(black_box(&family), 0).unwrap());
    });
    let t_decide_general = median_time(51, || {
        black_box(decide_general(black_box(&family), 0).unwrap());
    });
    let t_mc = median_time(5, || {
        black_box(monte_carlo_gamma(black_box(&arms), &mut rng));
    });
    let err = |s: &[posteriord::stats::ArmSummary]| {
        let b: Vec<f64> = s.iter().map(|a| a.prob_best).collect();
        let l: Vec<f64> = s.iter().map(|a| a.expected_loss).collect();
        (
            max_error(&b, &R11_BEST).max(f64::EPSILON),
            max_error(&l, &R11_LOSS).max(f64::EPSILON * 1e-2),
        )
    };
    let ratio = |a: Duration, b: Duration| a.as_secs_f64() / b.as_secs_f64();
    println!("statistics core, 2 defect-rate arms (METHODS R11, reference mpmath 40 digits):");
    println!(
        "  compare, two-arm fast path: {t_fast:?}; shared-grid path: {t_general:?} ({:.1}x faster)",
        ratio(t_general, t_fast)
    );
    println!("  decide, two-arm fast path: {t_decide:?}; shared-grid path: {t_decide_general:?} ({:.1}x faster)", ratio(t_decide_general, t_decide));
    println!("  Monte Carlo, {MC_DRAWS} draws (P(best) and loss only): {t_mc:?}");
    println!(
        "  speed ratio MC/compare: {:.1}x (shared-grid path: {:.1}x)",
        ratio(t_mc, t_fast),
        ratio(t_mc, t_general)
    );
    println!(
        "  speed ratio MC/decide: {:.1}x (shared-grid path: {:.1}x)",
        ratio(t_mc, t_decide),
        ratio(t_mc, t_decide_general)
    );
    let (fb, fl) = err(&fast);
    let (gb, gl) = err(&general);
    let m_best = max_error(&mc_best, &R11_BEST);
    let m_loss = max_error(&mc_loss, &R11_LOSS);
    println!("  P(best) max abs error: fast {fb:.1e}, shared grid {gb:.1e}, MC {m_best:.1e}");
    println!("  loss    max abs error: fast {fl:.1e}, shared grid {gl:.1e}, MC {m_loss:.1e}");
}

fn arms_for(k: usize, n: f64) -> Arms {
    // Conversion around 5% with small spreads between arms (a fictional app's push test).
    let arms = (0..k)
        .map(|j| {
            let p = 0.05 * (1.0 + 0.002 * j as f64);
            let s = (n * p).round();
            Beta::new(1.0 + s, 1.0 + n - s).unwrap()
        })
        .collect();
    Arms::Beta(arms)
}

/// Two defect-rate arms around 2 defects per 1 000 units of exposure, n units each.
fn gamma_pair(n: f64) -> Arms {
    let arms = [0.002, 0.00204]
        .iter()
        .map(|&rate| Gamma::new(1.0 + (n * rate).round(), 1.0 + n).unwrap())
        .collect();
    Arms::Gamma(arms)
}

/// k defect-rate arms around 2 defects per 1 000 units of exposure, n units each (an invented
/// delivery app's crash test with k − 1 builds against the shipped one).
fn gamma_arms(k: usize, n: f64) -> Arms {
    Arms::Gamma(
        (0..k)
            .map(|j| {
                let rate = 0.002 * (1.0 + 0.01 * j as f64);
                Gamma::new(1.0 + (n * rate).round(), 1.0 + n).unwrap()
            })
            .collect(),
    )
}

/// Four arms with shapes 1e-3..1e-1 and rates 1..1e9 (`sensor_spread_4` of
/// tests/reference/gamma_many_table.in, where the ratio quadrature was 3e-9 off on harm and
/// ROPE and 7e-6 relative on a lift end).
fn gamma_tiny() -> Arms {
    Arms::Gamma(vec![
        Gamma::new(0.0016578552276172037, 450803768.7618457).unwrap(),
        Gamma::new(0.030935442594251735, 1.0).unwrap(),
        Gamma::new(0.01, 1e3).unwrap(),
        Gamma::new(0.1, 1e9).unwrap(),
    ])
}

fn print_gamma_many_ratios() {
    println!("statistics core, 3..16 defect-rate arms: compare (pairwise quantities from each pair's table) against compare_general (ratio quadrature), same run:");
    let mut cases: Vec<(String, Arms, usize)> = Vec::new();
    for &k in &[3usize, 4, 16] {
        for &n in &[1e3, 1e8] {
            cases.push((format!("k={k} n={n:e}"), gamma_arms(k, n), 0));
        }
    }
    cases.push(("k=4 tiny shapes".to_string(), gamma_tiny(), 1));
    for (name, arms, control) in cases {
        let opts = CompareOptions {
            control,
            harm_margin: 0.1,
            ..CompareOptions::default()
        };
        let t_new = median_time(51, || {
            black_box(compare(black_box(&arms), &opts).unwrap());
        });
        let t_old = median_time(51, || {
            black_box(compare_general(black_box(&arms), &opts).unwrap());
        });
        println!(
            "  {name}: compare {t_new:?}, compare_general {t_old:?} ({:.2}x faster)",
            t_old.as_secs_f64() / t_new.as_secs_f64()
        );
    }
}

fn bench_compare(c: &mut Criterion) {
    print_ratios();
    print_gamma_ratios();
    print_gamma_many_ratios();
    let mut many = c.benchmark_group("gamma_k");
    many.sample_size(20);
    for &k in &[4usize, 16] {
        let arms = gamma_arms(k, 1e8);
        let opts = CompareOptions::default();
        many.bench_with_input(BenchmarkId::new("compare", k), &arms, |b, arms| {
            b.iter(|| compare(black_box(arms), &opts).unwrap())
        });
        many.bench_with_input(BenchmarkId::new("compare general", k), &arms, |b, arms| {
            b.iter(|| compare_general(black_box(arms), &opts).unwrap())
        });
    }
    many.finish();
    let mut pair = c.benchmark_group("gamma2");
    pair.sample_size(20);
    for &n in &[1e3, 1e8] {
        let arms = gamma_pair(n);
        let opts = CompareOptions::default();
        let rules_only = CompareOptions {
            lift_interval: false,
            equivalence: false,
            ..opts
        };
        type Entry = fn(&Arms, &CompareOptions) -> usize;
        let entries: [(&str, Entry); 6] = [
            ("compare fast", |a, o| compare(a, o).unwrap().len()),
            ("compare general", |a, o| {
                compare_general(a, o).unwrap().len()
            }),
            ("rules-only fast", |a, o| compare(a, o).unwrap().len()),
            ("rules-only general", |a, o| {
                compare_general(a, o).unwrap().len()
            }),
            ("decide fast", |a, o| decide(a, o.control).unwrap().len()),
            ("decide general", |a, o| {
                decide_general(a, o.control).unwrap().len()
            }),
        ];
        for (name, f) in entries {
            let o = if name.starts_with("rules") {
                rules_only
            } else {
                opts
            };
            pair.bench_with_input(
                BenchmarkId::new(format!("{name} n={n:e}"), 2),
                &arms,
                |b, arms| b.iter(|| f(black_box(arms), &o)),
            );
        }
    }
    pair.finish();
    let mut group = c.benchmark_group("compare");
    group.sample_size(20);
    for &n in &[1e3, 1e8] {
        for &k in &[2usize, 4, 16, 64] {
            let arms = arms_for(k, n);
            let opts = CompareOptions::default();
            group.bench_with_input(BenchmarkId::new(format!("n={n:e}"), k), &arms, |b, arms| {
                b.iter(|| compare(black_box(arms), &opts).unwrap())
            });
            group.bench_with_input(
                BenchmarkId::new(format!("decide n={n:e}"), k),
                &arms,
                |b, arms| b.iter(|| decide(black_box(arms), 0).unwrap()),
            );
        }
    }
    group.finish();
}

criterion_group!(benches, bench_compare);
criterion_main!(benches);
