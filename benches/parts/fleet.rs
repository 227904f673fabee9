//! Target 7 of docs/performance.md: the fleet view at 5 000 experiments × 3 variants. A
//! running service with that fleet and some traffic; `GET /v1/experiments?limit=100` timed
//! against the same kind of request for one experiment (`GET /v1/experiments/{id}`), and the
//! overview's load in headless Chromium (the browser's own clock) against the overview
//! searched down to one experiment. Both baselines run in the same process, same run.
//!
//! Included by `targets.rs` (`#[path]`; outside `benches/`'s top level so Cargo does not take
//! it for a bench of its own), so it shares its server, HTTP and workload helpers.

use std::path::Path;
use std::process::Command;
use std::time::{Duration, Instant};

use super::{
    http_get, http_request, median, sized, smoke, workload_events, workload_toml, Row, Server,
};

/// Time one GET (fresh loopback connection, as a client without keep-alive would), in ms.
fn timed_get(port: u16, path: &str) -> f64 {
    let t = Instant::now();
    let reply = http_get(port, path);
    let ms = t.elapsed().as_secs_f64() * 1e3;
    assert_eq!(reply.map(|r| r.0), Some(200), "GET {path}");
    ms
}

/// Median times of `a` and `b`, interleaved so that both see the same machine.
fn interleaved(port: u16, a: &str, b: &str, rounds: usize) -> (f64, f64) {
    let (mut xs, mut ys) = (Vec::new(), Vec::new());
    for _ in 0..rounds {
        xs.push(timed_get(port, a));
        ys.push(timed_get(port, b));
    }
    (median(xs), median(ys))
}

fn chromium() -> Option<String> {
    let out = Command::new("sh")
        .args(["-c", "command -v chromium || command -v chromium-browser"])
        .output()
        .ok()?;
    let path = String::from_utf8_lossy(&out.stdout).trim().to_string();
    (out.status.success() && !path.is_empty()).then_some(path)
}

/// The page's load time by the browser's clock (the overview writes it into the body as
/// `data-loaded-ms` at its load event), and the wall time of the whole browser run.
fn browser_load(chromium: &str, url: &str, work: &Path) -> (f64, f64) {
    let profile = tempfile::tempdir_in(work).expect("profile dir");
    let t = Instant::now();
    let out = Command::new(chromium)
        .args([
            "--headless",
            "--no-sandbox",
            "--disable-gpu",
            "--disable-background-networking",
            "--disable-component-update",
            "--disable-sync",
            "--no-first-run",
            "--disable-dev-shm-usage",
        ])
        .arg(format!("--user-data-dir={}", profile.path().display()))
        .arg("--dump-dom")
        .arg(url)
        .stderr(std::process::Stdio::null())
        .output()
        .expect("chromium runs");
    let wall = t.elapsed().as_secs_f64() * 1e3;
    let dom = String::from_utf8_lossy(&out.stdout);
    let marker = "data-loaded-ms=\"";
    let i = dom
        .find(marker)
        .unwrap_or_else(|| panic!("{url}: the page did not report its load time"));
    let rest = &dom[i + marker.len()..];
    let ms: f64 = rest[..rest.find('"').unwrap()].parse().expect("a number");
    (ms, wall)
}

pub(super) fn fleet_target(work: &Path) -> Vec<Row> {
    let n = sized(5_000, 200);
    let variants = 3;
    println!("\n== fleet: {n} experiments × {variants} variants, list and overview ==");
    let store = work.join("fleet-store");
    let config = format!(
        "[store]\ndir = \"{}\"\n{}",
        store.display(),
        workload_toml(n, variants)
    );
    let mut server = Server::start(&work.join("fleet"), &config);
    server.wait_ready(Duration::from_secs(300));
    let port = server.port;
    // Traffic over every experiment, posted as NDJSON.
    let events = workload_events(sized(200_000, 20_000), n, variants);
    for chunk in events.chunks(20_000) {
        let mut body = Vec::new();
        for e in chunk {
            body.extend_from_slice(e);
            body.push(b'\n');
        }
        let body = String::from_utf8(body).expect("events are text");
        let status = http_request(port, "POST", "/v1/events", Some(&body)).map(|r| r.0);
        assert!(
            matches!(status, Some(200 | 422)),
            "posting events: {status:?}"
        );
    }
    // Wait until the background round has summarised every experiment.
    let t = Instant::now();
    loop {
        let (_, main) = http_get(port, "/?part=main").expect("overview");
        if !main.contains("data-role=\"pending\"") {
            break;
        }
        assert!(
            t.elapsed() < Duration::from_secs(600),
            "fleet never summarised"
        );
        std::thread::sleep(Duration::from_millis(200));
    }
    println!(
        "  every experiment summarised {:.1} s after the events were posted",
        t.elapsed().as_secs_f64()
    );
    let rounds = sized(60, 5);
    let one = "/v1/experiments/orchard-17";
    let (list, single) = interleaved(port, "/v1/experiments?limit=100", one, rounds);
    let (list_attention, _) = interleaved(
        port,
        "/v1/experiments?limit=100&sort=attention",
        one,
        rounds,
    );
    let (overview, overview_one) = interleaved(port, "/", "/?q=orchard-17&sort=id", rounds);
    println!(
        "  GET /v1/experiments?limit=100: {list:.2} ms (sort=attention {list_attention:.2} ms); GET {one}: {single:.2} ms (medians of {rounds})"
    );
    println!("  GET / (HTML, server): {overview:.2} ms; searched to one experiment: {overview_one:.2} ms");
    let mut rows = vec![Row {
        target: "7 list 100 of the fleet (GET ?limit=100)",
        baseline: format!("one experiment {single:.2} ms"),
        ours: format!("{list:.2} ms"),
        ratio: format!("{:.2}×", list / single),
        goal: "< 50 ms",
        met: (!smoke()).then_some(list < 50.0),
    }];
    match chromium() {
        None => {
            println!("  chromium not on PATH: the browser half of target 7 is skipped");
            rows.push(Row {
                target: "7 overview load in Chromium",
                baseline: "-".into(),
                ours: "skipped: no chromium".into(),
                ratio: "-".into(),
                goal: "< 1 s",
                met: None,
            });
        }
        Some(c) => {
            let base = format!("http://127.0.0.1:{port}");
            let (mut full, mut single) = (Vec::new(), Vec::new());
            let (mut full_wall, mut single_wall) = (Vec::new(), Vec::new());
            for _ in 0..sized(7, 2) {
                let (ms, wall) = browser_load(&c, &format!("{base}/"), work);
                full.push(ms);
                full_wall.push(wall);
                let (ms, wall) = browser_load(&c, &format!("{base}/?q=orchard-17&sort=id"), work);
                single.push(ms);
                single_wall.push(wall);
            }
            let (full, single) = (median(full), median(single));
            println!(
                "  overview load (browser clock): {full:.0} ms, one experiment {single:.0} ms; whole chromium runs {:.0} / {:.0} ms",
                median(full_wall),
                median(single_wall)
            );
            rows.push(Row {
                target: "7 overview load in Chromium",
                baseline: format!("one experiment {single:.0} ms"),
                ours: format!("{full:.0} ms"),
                ratio: format!("{:.2}×", full / single),
                goal: "< 1 s",
                met: (!smoke()).then_some(full < 1000.0),
            });
        }
    }
    server.stop();
    rows
}
