//! The dashboard in a real browser (headless Chromium loads the running demo; the DOM must hold
//! every plot with one series per variant, and a screenshot is saved), and the history route
//! over real HTTP: shape, exact agreement with the experiment document, the conjugate
//! closed form, the idle rule and every error.

mod common;

use std::io::{BufRead, BufReader};
use std::path::PathBuf;
use std::process::{Command, Stdio};
use std::time::Duration;

use common::browser::{attr, browser, chromium, dump_dom, tags};
use common::{bin, client, signal, wait_exit, wait_for, Service};
use serde_json::Value;

/// The part of `dom` inside the `<svg>` of plot `kind` for `metric`.
fn plot<'a>(dom: &'a str, kind: &str, metric: &str) -> &'a str {
    let needle = format!(r#"data-plot="{kind}" data-metric="{metric}""#);
    let Some(i) = dom.find(&needle) else {
        panic!("the page has no `{kind}` plot for metric `{metric}`");
    };
    let end = dom[i..].find("</svg>").expect("closed svg");
    &dom[i..i + end]
}

/// Variants of the series in one plot, each with its point count.
fn series(svg: &str) -> Vec<(String, usize)> {
    tags(svg, "g", &[("class", "series")])
        .iter()
        .map(|a| {
            (
                attr(a, "data-variant").unwrap().to_string(),
                attr(a, "data-points").unwrap().parse().unwrap(),
            )
        })
        .collect()
}

fn test_output_dir() -> PathBuf {
    // Integration tests get `<target>/tmp`; the screenshot goes beside it.
    let dir = PathBuf::from(env!("CARGO_TARGET_TMPDIR"))
        .parent()
        .unwrap()
        .join("test-output");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

#[test]
fn the_demo_dashboard_shows_every_plot_in_a_real_browser() {
    let browser_path = chromium();
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("demo.log");
    let mut child = Command::new(bin())
        .args([
            "demo",
            "--addr",
            "127.0.0.1:0",
            "--units-per-second",
            "300",
            "--duration",
            "120",
        ])
        .current_dir(dir.path())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    // The first line of the demo's output is the dashboard URL.
    let mut reader = BufReader::new(child.stdout.take().unwrap());
    let mut first = String::new();
    reader.read_line(&mut first).unwrap();
    std::thread::spawn(move || {
        let mut sink = String::new();
        while reader.read_line(&mut sink).map(|n| n > 0).unwrap_or(false) {
            sink.clear();
        }
    });
    let first = first.trim();
    assert!(
        first.starts_with("dashboard: http://") && first.ends_with('/'),
        "first line of the demo: {first}"
    );
    let dashboard = first.trim_start_matches("dashboard: ").to_string();
    let base = dashboard.trim_end_matches('/').to_string();
    let http = client();
    let get = |path: &str| -> Value {
        http.get(format!("{base}{path}"))
            .send()
            .and_then(|r| r.json())
            .unwrap_or(Value::Null)
    };

    // Wait until every experiment has a few recorded evaluations.
    let experiments = get("/v1/experiments")["experiments"]
        .as_array()
        .cloned()
        .expect("experiment list");
    assert!(experiments.len() >= 2);
    for e in &experiments {
        let id = e["id"].as_str().unwrap();
        let metric = e["metrics"][0]["name"]
            .as_str()
            .or_else(|| e["metrics"][0].as_str())
            .expect("metric name")
            .to_string();
        wait_for(Duration::from_secs(60), "four recorded evaluations", || {
            let h = get(&format!("/v1/experiments/{id}/history?metric={metric}"));
            (h["points"].as_array().map_or(0, Vec::len) >= 4).then_some(())
        });
    }

    // The countdown banner is clearly worse in the demo: wait for its harm alert, which the
    // page's timeline must show as an alert lane.
    let alert = wait_for(Duration::from_secs(60), "the demo's harm alert", || {
        get("/v1/alerts?experiment=crumb-delivery-banner")["alerts"]
            .as_array()
            .and_then(|a| a.iter().find(|a| a["rule"] == "harm").cloned())
    });
    assert_eq!(alert["variant"], "countdown");

    let profile = dir.path().join("chromium-profile");
    // The list page: one row per experiment the API lists, each linking to its page.
    let list = dump_dom(&dashboard, Some(1000));
    for e in &experiments {
        let id = e["id"].as_str().unwrap();
        assert_eq!(
            tags(&list, "tr", &[("data-experiment", id)]).len(),
            1,
            "row of {id}"
        );
        assert!(list.contains(&format!(r#"href="/experiments/{id}""#)));
    }

    // The three-arm bakery experiment and the two-metric checkout experiment, after the
    // refresh script swapped the main part in at least once.
    for id in ["crumb-delivery-banner", "crumb-checkout-copy"] {
        let doc = get(&format!("/v1/experiments/{id}"));
        let variants: Vec<String> = doc["variants"]
            .as_array()
            .unwrap()
            .iter()
            .map(|v| v["name"].as_str().unwrap().to_string())
            .collect();
        let control = doc["control"].as_str().unwrap().to_string();
        let metrics: Vec<String> = doc["metrics"]
            .as_array()
            .unwrap()
            .iter()
            .map(|m| m["name"].as_str().unwrap().to_string())
            .collect();
        assert!(variants.len() >= 2 && !metrics.is_empty());
        let dom = dump_dom(&format!("{base}/experiments/{id}"), Some(12_000));
        let main = tags(&dom, "main", &[]);
        let refreshed: u32 = attr(&main[0], "data-refreshed").unwrap().parse().unwrap();
        assert!(refreshed >= 1, "the page never refreshed its main part");
        assert_eq!(tags(&dom, "h1", &[("data-experiment", id)]).len(), 1);
        for metric in &metrics {
            let names = |kind: &str| -> Vec<(String, usize)> { series(plot(&dom, kind, metric)) };
            // Densities: every variant once, each a full curve.
            let density = names("density");
            let got: Vec<&str> = density.iter().map(|(v, _)| v.as_str()).collect();
            assert_eq!(
                got,
                variants.iter().map(String::as_str).collect::<Vec<_>>(),
                "{id}/{metric} density"
            );
            assert!(density.iter().all(|(_, n)| *n > 100));
            // Lift: every variant but the control, with its interval bar and the ROPE band.
            let lift_svg = plot(&dom, "lift", metric);
            let lift: Vec<String> = series(lift_svg).into_iter().map(|(v, _)| v).collect();
            let non_control: Vec<String> = variants
                .iter()
                .filter(|v| **v != control)
                .cloned()
                .collect();
            assert_eq!(lift, non_control, "{id}/{metric} lift");
            assert_eq!(
                tags(lift_svg, "g", &[("data-role", "interval")]).len(),
                non_control.len()
            );
            assert_eq!(tags(lift_svg, "g", &[("data-role", "rope")]).len(), 1);
            // Over time: every variant, several points each.
            for kind in ["prob-best", "expected-loss"] {
                let s = names(kind);
                let got: Vec<&str> = s.iter().map(|(v, _)| v.as_str()).collect();
                assert_eq!(
                    got,
                    variants.iter().map(String::as_str).collect::<Vec<_>>(),
                    "{id}/{metric} {kind}"
                );
                assert!(
                    s.iter().all(|(_, n)| *n >= 4),
                    "{id}/{metric} {kind}: {s:?}"
                );
            }
            // The threshold of caring, where the metric has one, at the configured value.
            let history = get(&format!("/v1/experiments/{id}/history?metric={metric}"));
            let marks = tags(
                plot(&dom, "expected-loss", metric),
                "g",
                &[("data-role", "threshold")],
            );
            match history["threshold_of_caring"].as_f64() {
                Some(t) => {
                    assert_eq!(marks.len(), 1);
                    let shown: f64 = attr(&marks[0], "data-value").unwrap().parse().unwrap();
                    assert_eq!(shown, t);
                }
                None => assert!(marks.is_empty()),
            }
        }
        // The rule timeline (with the harm alert's lane) and the data-quality checks.
        assert!(dom.contains(r#"data-plot="timeline""#));
        if id == "crumb-delivery-banner" {
            assert!(!tags(&dom, "g", &[("class", "lane alert"), ("data-rule", "harm")]).is_empty());
            assert!(!tags(&dom, "g", &[("class", "lane rule"), ("data-rule", "harm")]).is_empty());
        }
        assert_eq!(tags(&dom, "section", &[("data-role", "quality")]).len(), 1);
        assert_eq!(tags(&dom, "p", &[("data-check", "sample_ratio")]).len(), 1);
        for check in ["crossover", "orphan"] {
            assert_eq!(
                tags(&dom, "tr", &[("data-check", check)]).len(),
                1,
                "{check}"
            );
        }
    }

    // A screenshot of the three-arm experiment, kept with the test output.
    let shot = test_output_dir().join("dashboard.png");
    let _ = std::fs::remove_file(&shot);
    let status = browser(&profile)
        .arg("--window-size=1300,2450")
        .arg(format!("--screenshot={}", shot.display()))
        .arg(format!("{base}/experiments/crumb-delivery-banner"))
        .status()
        .expect("run chromium");
    assert!(status.success());
    let png = std::fs::read(&shot).expect("screenshot written");
    assert_eq!(&png[..8], b"\x89PNG\r\n\x1a\n", "a PNG file");
    assert!(png.len() > 20_000, "screenshot of {} bytes", png.len());
    eprintln!(
        "dashboard screenshot ({}): {}",
        browser_path.display(),
        shot.display()
    );

    signal(child.id(), "TERM");
    wait_exit(&mut child, Duration::from_secs(20)).expect("demo exits on SIGTERM");
}

fn serve_config() -> String {
    // Evaluate every second of event time, so each timed batch below makes a point.
    format!(
        "[http]\naddr = \"127.0.0.1:0\"\n[alerts]\nevaluate_every_secs = 1\n{}",
        common::TEST_EXPERIMENTS
    )
}

/// A tally at `second` past 10:00 on an invented day. Evaluation follows event time, so the
/// tests give their events times.
fn tally(variant: &str, trials: u64, successes: u64, second: u32) -> String {
    format!(
        r#"{{"type":"tally","experiment":"checkout-copy","metric":"purchase","variant":"{variant}","trials":{trials},"successes":{successes},"time":"2026-06-01T10:00:{second:02}Z"}}"#
    )
}

/// A clean report on the guardrail at `second` past 10:00: it changes no purchase count but
/// advances the experiment's event time, which makes it due for evaluation.
fn tick(second: u32) -> String {
    format!(
        r#"{{"type":"defect","experiment":"checkout-copy","metric":"payment-error","variant":"control","count":0,"time":"2026-06-01T10:00:{second:02}Z"}}"#
    )
}

fn points(service: &Service) -> Vec<Value> {
    let (status, h) = service.get("/v1/experiments/checkout-copy/history?metric=purchase");
    assert_eq!(status, 200);
    h["points"].as_array().cloned().unwrap_or_default()
}

#[test]
fn history_route_over_real_http() {
    let state = tempfile::tempdir().unwrap();
    let service = Service::start_in(&serve_config(), Some(state.path()), &[]);
    let body = [
        tally("control", 1200, 130, 0),
        tally("short-copy", 1180, 151, 0),
        tick(2),
    ]
    .join("\n");
    let (status, reply) = service.post("/v1/events", body);
    assert_eq!(status, 200, "{reply}");
    // The first point is the first evaluation with data (none is recorded before any event).
    let first = wait_for(Duration::from_secs(20), "a recorded evaluation", || {
        points(&service).into_iter().next()
    });
    let (_, h) = service.get("/v1/experiments/checkout-copy/history?metric=purchase");
    assert_eq!(h["experiment"], "checkout-copy");
    assert_eq!(h["metric"], "purchase");
    assert_eq!(h["kind"], "conversion");
    assert_eq!(h["control"], "control");
    assert_eq!(h["variants"], serde_json::json!(["control", "short-copy"]));
    assert!(h["capacity"].as_u64().unwrap() >= 32);
    assert_eq!(first["covers"], 1);
    assert_eq!(first["at"], first["since"]);

    // Beta(1, 1) prior + 151 of 1180: posterior mean (1 + 151)/(2 + 1180), the conjugate
    // closed form (Gelman et al., Bayesian Data Analysis, 3rd ed., §2.4).
    let mean = first["arms"][1]["mean"].as_f64().unwrap();
    assert!((mean - 152.0 / 1182.0).abs() < 1e-12, "{mean}");
    let control = first["arms"][0]["mean"].as_f64().unwrap();
    assert!((control - 131.0 / 1202.0).abs() < 1e-12, "{control}");

    // The recorded numbers are those the experiment document reports for the same data.
    let (_, doc) = service.get("/v1/experiments/checkout-copy");
    let m = doc["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["name"] == "purchase")
        .unwrap()
        .clone();
    for (i, arm) in first["arms"].as_array().unwrap().iter().enumerate() {
        let d = &m["variants"][i];
        assert_eq!(arm["variant"], d["name"]);
        for key in [
            "mean",
            "prob_best",
            "expected_loss",
            "prob_better_than_control",
            "prob_harm",
        ] {
            assert_eq!(arm[key], d[key], "{key} of arm {i}");
        }
        assert_eq!(arm["interval"]["lower"], d["interval"]["lower"]);
        assert_eq!(arm["interval"]["upper"], d["interval"]["upper"]);
    }
    let p_best: f64 = first["arms"]
        .as_array()
        .unwrap()
        .iter()
        .map(|a| a["prob_best"].as_f64().unwrap())
        .sum();
    assert!((p_best - 1.0).abs() < 1e-9);

    // No new events: later evaluations add no point.
    let n = points(&service).len();
    std::thread::sleep(Duration::from_millis(2500));
    assert_eq!(
        points(&service).len(),
        n,
        "an idle experiment gained points"
    );

    // New events: a new point, older ones unchanged.
    let (status, _) = service.post("/v1/events", tally("control", 300, 40, 3));
    assert_eq!(status, 200);
    let after = wait_for(Duration::from_secs(20), "a second point", || {
        let p = points(&service);
        (p.len() > n).then_some(p)
    });
    assert_eq!(after[n - 1], points(&service)[n - 1]);
    let last = after.last().unwrap();
    assert!((last["arms"][0]["mean"].as_f64().unwrap() - 171.0 / 1502.0).abs() < 1e-12);

    // Errors: one shape, a code, and the metrics to choose from.
    let (status, e) = service.get("/v1/experiments/checkout-copy/history");
    assert_eq!(status, 400);
    assert_eq!(e["error"]["code"], "bad_query");
    assert_eq!(
        e["error"]["details"]["metrics"],
        serde_json::json!(["purchase", "payment-error"])
    );
    let (status, e) = service.get("/v1/experiments/checkout-copy/history?metric=refund");
    assert_eq!(status, 404);
    assert_eq!(e["error"]["code"], "unknown_metric");
    assert!(e["error"]["message"].as_str().unwrap().contains("refund"));
    let (status, e) = service.get("/v1/experiments/nope/history?metric=purchase");
    assert_eq!(status, 404);
    assert_eq!(e["error"]["code"], "unknown_experiment");
    // A known experiment that has seen nothing yet has an empty series of the right shape.
    let (status, h) = service.get("/v1/experiments/jar-sensor/history?metric=jam");
    assert_eq!(status, 200);
    assert_eq!(h["points"], serde_json::json!([]));
    assert_eq!(
        h["variants"],
        serde_json::json!(["old-sensor", "laser", "camera"])
    );
    assert_eq!(h["kind"], "defect_rate");

    // The dashboard routes over plain HTTP: pages, the refresh fragment, a missing experiment.
    let r = client()
        .get(service.url("/experiments/checkout-copy"))
        .send()
        .unwrap();
    assert_eq!(r.status(), 200);
    assert!(r.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/html"));
    // No external resources, no framing; the browser test shows the refresh still works
    // under this policy.
    let csp = r.headers()["content-security-policy"].to_str().unwrap();
    assert!(csp.contains("default-src 'none'") && csp.contains("frame-ancestors 'none'"));
    let page = r.text().unwrap();
    assert!(page.starts_with("<!doctype html>") && page.contains(r#"data-plot="density""#));
    let (status, part) = service.get_text("/experiments/checkout-copy?part=main");
    assert_eq!(status, 200);
    assert!(!part.contains("<html") && part.contains(r#"data-plot="prob-best""#));
    let (status, part) = service.get_text("/?part=main");
    assert_eq!(status, 200);
    assert!(part.contains(r#"data-experiment="checkout-copy""#));
    let (status, page) = service.get_text("/experiments/nope");
    assert_eq!(status, 404);
    assert!(page.contains("No experiment"));

    // The history is stored at shutdown and read back at start-up, point for point; a file
    // that cannot be read is set aside, not overwritten, and the service still starts.
    let before = points(&service);
    let mut service = service;
    signal(service.child.id(), "TERM");
    wait_exit(&mut service.child, Duration::from_secs(20)).expect("exits on SIGTERM");
    let file = state.path().join("history/checkout-copy.json");
    assert!(file.exists(), "no history file at {}", file.display());
    let garbage = state.path().join("history/jar-sensor.json");
    std::fs::write(&garbage, b"{\"version\":1,\"experiment\":").unwrap();
    let again = Service::start_in(&serve_config(), Some(state.path()), &[]);
    assert_eq!(points(&again), before);
    assert!(!garbage.exists());
    assert!(state
        .path()
        .join("history/jar-sensor.json.unreadable")
        .exists());
    let log = std::fs::read_to_string(&again.log).unwrap();
    assert!(log.contains("cannot read a stored history"), "{log}");
}

#[test]
fn the_plotted_intervals_are_the_api_numbers_in_a_real_browser() {
    chromium();
    let service = Service::start(&serve_config());
    let body = [
        tally("control", 2400, 262, 0),
        tally("short-copy", 2390, 301, 0),
        tick(2),
    ]
    .join("\n");
    let (status, reply) = service.post("/v1/events", body);
    assert_eq!(status, 200, "{reply}");
    wait_for(Duration::from_secs(20), "a recorded evaluation", || {
        (!points(&service).is_empty()).then_some(())
    });
    let (_, doc) = service.get("/v1/experiments/checkout-copy");
    let purchase = doc["metrics"]
        .as_array()
        .unwrap()
        .iter()
        .find(|m| m["name"] == "purchase")
        .unwrap()
        .clone();
    let lift = &purchase["variants"][1]["lift"]["interval"];
    let dom = dump_dom(&service.url("/experiments/checkout-copy"), Some(500));
    // The interval bar under the lift curve is `compare`'s lift interval, to the last digit.
    let bars = tags(
        plot(&dom, "lift", "purchase"),
        "g",
        &[("data-role", "interval"), ("data-variant", "short-copy")],
    );
    assert_eq!(bars.len(), 1);
    let lower: f64 = attr(&bars[0], "data-lower").unwrap().parse().unwrap();
    let upper: f64 = attr(&bars[0], "data-upper").unwrap().parse().unwrap();
    assert_eq!(lower, lift["lower"].as_f64().unwrap());
    assert_eq!(upper, lift["upper"].as_f64().unwrap());
    // The numbers table shows the document's P(best) for each arm (four decimals).
    for (i, v) in ["control", "short-copy"].iter().enumerate() {
        let p = purchase["variants"][i]["prob_best"].as_f64().unwrap();
        let row_start = dom
            .find(&format!(r#"<tr data-variant="{v}">"#))
            .expect("numbers row");
        let row = &dom[row_start..row_start + dom[row_start..].find("</tr>").unwrap()];
        assert!(
            row.contains(&format!("{p:.4}")),
            "{v}: P(best) {p:.4} not in its row"
        );
        // Raw counts beside the estimates, and the expected loss in percentage points.
        let counts = format!(
            "{} / {}",
            purchase["variants"][i]["successes"], purchase["variants"][i]["trials"]
        );
        assert!(row.contains(&counts), "{v}: {counts} not in {row}");
        assert!(row.contains(" pp<"), "{v}: no percentage points in {row}");
    }
    // Every history point is on the P(best) curve of each variant.
    let n = points(&service).len();
    let s = series(plot(&dom, "prob-best", "purchase"));
    assert_eq!(
        s,
        vec![("control".to_string(), n), ("short-copy".to_string(), n)]
    );
}
