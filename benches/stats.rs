//! Benchmarks of the statistics core: exact quadrature against a 1e5-draw Monte Carlo
//! estimator of the same decision quantities, and the cost of a full `compare` (and of the
//! P(best)/loss/P(better than control)-only `decide`) for 2..64 arms.
//!
//! Run with `cargo bench --bench stats`. Before the criterion groups it prints, from one run,
//! the speed ratio (Monte Carlo time / exact time) and the error ratio (Monte Carlo error /
//! exact error) against the mpmath reference in tests/reference/cases.json.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use criterion::{black_box, criterion_group, criterion_main, BenchmarkId, Criterion};
use rand::rngs::StdRng;
use rand::SeedableRng;
use rand_distr::Distribution;
use serde_json::Value;

use posteriord::stats::{compare, decide, Arms, Beta, CompareOptions};

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

fn bench_compare(c: &mut Criterion) {
    print_ratios();
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
