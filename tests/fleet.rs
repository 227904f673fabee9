//! The fleet view with thousands of experiments, against the real binary over real HTTP: the
//! dashboard overview in headless Chromium on 5 000 experiments × 3 variants (counts per
//! state, a filter, a search, the second page), and the API's cursor paging walked to the end
//! while experiments are created and deleted, every experiment seen exactly once.
//!
//! The expected states come from how the test built each experiment's data, not from the
//! service: harm (one arm converts at a fifth of the control's rate), data quality (exposures
//! 3:1:1 against equal weights), ready (one arm converts three times as often, with a ship
//! rule), decided (ready, and its recorded decision acknowledged here), gathering (no data).

mod common;

use std::collections::{BTreeMap, BTreeSet};
use std::time::{Duration, Instant};

use common::browser::{attr, dump_dom, tags};
use common::{client, Service};
use serde_json::{json, Value};

const N: usize = 5_000;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Group {
    Harm,
    Quality,
    Ready,
    Gathering,
}

/// The test's own design of experiment `i`.
fn group(i: usize) -> Group {
    match (i % 400 == 7, i % 250 == 11, i % 200 == 19) {
        (true, false, false) => Group::Harm,
        (false, true, false) => Group::Quality,
        (false, false, true) => Group::Ready,
        (false, false, false) => Group::Gathering,
        _ => panic!("experiment {i} is in two groups; fix the design"),
    }
}

fn id(i: usize) -> String {
    format!("orchard-{i:04}")
}

/// Every tenth experiment also watches a defect-rate metric, for the metric filter.
fn has_refund(i: usize) -> bool {
    i % 10 == 3
}

fn fleet_config() -> String {
    let mut s =
        String::from("[http]\naddr = \"127.0.0.1:0\"\n\n[alerts]\nevaluate_every_events = 100\n\n");
    for i in 0..N {
        s.push_str(&format!(
            // Every event carries the one time T, so no minimum duration can pass: 0 lets the
            // ready group's ship rule hold on the data alone.
            "[[experiment]]\nid = \"{}\"\nvariants = [ {{ name = \"control\" }}, {{ name = \"pear\" }}, {{ name = \"quince\" }} ]\nmin_duration_days = 0\n[[experiment.metric]]\nname = \"sprouted\"\nkind = \"conversion\"\n",
            id(i)
        ));
        match group(i) {
            Group::Harm => s.push_str("[experiment.metric.rules]\nmin_units = 100\n"),
            Group::Ready => s.push_str(
                "[experiment.metric.rules]\nmin_units = 100\nship = { threshold_of_caring = 0.01 }\n",
            ),
            _ => {}
        }
        if has_refund(i) {
            s.push_str("[[experiment.metric]]\nname = \"refund\"\nkind = \"defect_rate\"\nexposure = \"units\"\n");
        }
        s.push('\n');
    }
    s
}

const T: &str = "2026-04-02T10:00:00Z";

/// Exposures then conversions, interleaved across arms in proportion, so every evaluation on
/// the way (every 100 events) already sees the intended pattern.
fn events_for(i: usize) -> Vec<Value> {
    let arms = ["control", "pear", "quince"];
    let (units, conversions): ([usize; 3], [usize; 3]) = match group(i) {
        Group::Harm => ([150, 150, 150], [75, 15, 75]),
        Group::Quality => ([300, 100, 100], [0, 0, 0]),
        Group::Ready => ([150, 150, 150], [15, 15, 45]),
        Group::Gathering => return Vec::new(),
    };
    let exp = id(i);
    let mut out = Vec::new();
    let mut made = [0usize; 3];
    let total: usize = units.iter().sum();
    for k in 0..total {
        // The arm furthest behind its share goes next.
        let a = (0..3)
            .min_by(|&x, &y| {
                let fx = made[x] as f64 / units[x] as f64;
                let fy = made[y] as f64 / units[y] as f64;
                fx.total_cmp(&fy)
            })
            .unwrap();
        let _ = k;
        out.push(
            json!({"type": "exposure", "experiment": exp, "variant": arms[a],
            "unit": format!("{exp}-{}-{}", arms[a], made[a]), "time": T}),
        );
        made[a] += 1;
    }
    let mut done = [0usize; 3];
    let total: usize = conversions.iter().sum();
    for _ in 0..total {
        let a = (0..3)
            .filter(|&x| done[x] < conversions[x])
            .min_by(|&x, &y| {
                let fx = done[x] as f64 / conversions[x] as f64;
                let fy = done[y] as f64 / conversions[y] as f64;
                fx.total_cmp(&fy)
            })
            .unwrap();
        out.push(
            json!({"type": "conversion", "experiment": exp, "metric": "sprouted",
            "unit": format!("{exp}-{}-{}", arms[a], done[a]), "time": T}),
        );
        done[a] += 1;
    }
    out
}

fn post_all(svc: &Service, events: &[Value]) {
    for chunk in events.chunks(5_000) {
        let body: String = chunk.iter().map(|e| format!("{e}\n")).collect();
        let r = client()
            .post(svc.url("/v1/events"))
            .header("content-type", "application/x-ndjson")
            .body(body)
            .send()
            .expect("POST /v1/events");
        let status = r.status().as_u16();
        let reply: Value = r.json().unwrap_or(Value::Null);
        assert_eq!(status, 200, "{reply}");
        assert_eq!(
            reply["applied"].as_u64(),
            Some(chunk.len() as u64),
            "{reply}"
        );
    }
}

/// Every page of `path` (which has its own query) by cursor, with the replies' ids.
fn walk(svc: &Service, path: &str, key: &str) -> Vec<Value> {
    let mut out = Vec::new();
    let mut after: Option<String> = None;
    loop {
        let sep = if path.contains('?') { '&' } else { '?' };
        let url = match &after {
            None => path.to_string(),
            Some(c) => format!("{path}{sep}after={c}"),
        };
        let (status, page) = svc.get(&url);
        assert_eq!(status, 200, "{url}: {page}");
        out.extend(page[key].as_array().unwrap().iter().cloned());
        match page["next"].as_str() {
            Some(c) => after = Some(c.to_string()),
            None => return out,
        }
    }
}

/// The number in the count link `data-count="{name}"`.
fn count(dom: &str, name: &str) -> usize {
    let marker = format!(r#"data-count="{name}""#);
    let i = dom
        .find(&marker)
        .unwrap_or_else(|| panic!("no count `{name}` on the page"));
    let rest = &dom[i..];
    let start = rest.find(r#"class="n">"#).expect("count number") + r#"class="n">"#.len();
    let end = rest[start..].find('<').unwrap();
    rest[start..start + end].parse().expect("a number")
}

/// The rows of the experiment table: (id, state).
fn rows(dom: &str) -> Vec<(String, String)> {
    tags(dom, "tr", &[])
        .iter()
        .filter_map(|a| {
            Some((
                attr(a, "data-experiment")?.to_string(),
                attr(a, "data-state")?.to_string(),
            ))
        })
        .collect()
}

fn showing(dom: &str) -> Vec<(String, String)> {
    tags(dom, "p", &[("data-role", "showing")]).remove(0)
}

#[test]
fn the_overview_shows_five_thousand_experiments_in_a_real_browser() {
    let config = fleet_config();
    let svc = Service::start(&config);
    let events: Vec<Value> = (0..N).flat_map(events_for).collect();
    post_all(&svc, &events);
    let want = |g: Group| -> Vec<String> { (0..N).filter(|&i| group(i) == g).map(id).collect() };
    let (harm, quality, ready) = (want(Group::Harm), want(Group::Quality), want(Group::Ready));
    assert_eq!((harm.len(), quality.len(), ready.len()), (13, 20, 25));

    // Wait until every experiment is summarised and the evaluator has recorded a ship
    // decision for every ready experiment and opened the harm and sample-ratio alerts.
    let start = Instant::now();
    let recorded = loop {
        let (_, main) = svc.get_text("/?part=main");
        let pending = main.contains(r#"data-role="pending""#);
        let ship = walk(
            &svc,
            "/v1/alerts?rule=ship&state=recorded&limit=1000",
            "alerts",
        );
        let open = walk(&svc, "/v1/alerts?state=open&limit=1000", "alerts");
        let ship_exps: BTreeSet<String> = ship
            .iter()
            .map(|a| a["experiment"].as_str().unwrap().to_string())
            .collect();
        let open_exps: BTreeSet<String> = open
            .iter()
            .map(|a| a["experiment"].as_str().unwrap().to_string())
            .collect();
        let want_open: BTreeSet<String> = harm.iter().chain(&quality).cloned().collect();
        if !pending && ship_exps == ready.iter().cloned().collect() && open_exps == want_open {
            break ship;
        }
        assert!(
            start.elapsed() < Duration::from_secs(600),
            "not settled after 600 s: pending={pending}, ship decisions for {} of 25, open alerts in {} of 33 experiments",
            ship_exps.len(),
            open_exps.len()
        );
        std::thread::sleep(Duration::from_millis(500));
    };
    // A person acknowledges the decisions of the first ten ready experiments: decided.
    let decided: Vec<String> = ready[..10].to_vec();
    for a in &recorded {
        if decided.iter().any(|d| a["experiment"] == d.as_str()) {
            let (status, _) =
                svc.post(&format!("/v1/alerts/{}/ack", a["id"].as_str().unwrap()), "");
            assert_eq!(status, 200);
        }
    }

    let base = svc.url("");
    // Counts: each state once per experiment, as designed; open alerts as the API lists them.
    let dom = dump_dom(&format!("{base}/"), Some(500));
    assert_eq!(count(&dom, "all"), N);
    assert_eq!(count(&dom, "harm"), 13);
    assert_eq!(count(&dom, "data_quality"), 20);
    assert_eq!(count(&dom, "ready"), 15);
    assert_eq!(count(&dom, "decided"), 10);
    assert_eq!(count(&dom, "gathering"), N - 13 - 20 - 25);
    let open_alerts = walk(&svc, "/v1/alerts?limit=1000", "alerts")
        .iter()
        .filter(|a| a["state"] == "open" || a["state"] == "easing")
        .count();
    assert_eq!(count(&dom, "open-alerts"), open_alerts);
    let alerting = tags(&dom, "a", &[("data-count", "open-alerts")]);
    assert_eq!(attr(&alerting[0], "data-experiments"), Some("33"));
    // Needs a person first: harm, then data quality, then ready, on the first page.
    let first = rows(&dom);
    assert_eq!(first.len(), 50);
    let states: Vec<&str> = first.iter().map(|r| r.1.as_str()).collect();
    assert!(states[..13].iter().all(|s| *s == "harm"), "{states:?}");
    assert!(
        states[13..33].iter().all(|s| *s == "data_quality"),
        "{states:?}"
    );
    assert!(states[33..48].iter().all(|s| *s == "ready"), "{states:?}");
    assert!(states[48..].iter().all(|s| *s == "gathering"), "{states:?}");
    // Every count links to its filtered list, which holds that many.
    let link = tags(&dom, "a", &[("data-count", "data_quality")]);
    let href = attr(&link[0], "href").unwrap().replace("&amp;", "&");
    let filtered = dump_dom(&format!("{base}{href}"), None);
    assert_eq!(attr(&showing(&filtered), "data-matched"), Some("20"));
    let got: Vec<String> = rows(&filtered).into_iter().map(|r| r.0).collect();
    assert_eq!(got, quality, "sorted by open alerts (one each), then id");

    // A filter: state harm gives exactly the harm experiments.
    let dom = dump_dom(&format!("{base}/?state=harm"), None);
    let got: BTreeSet<String> = rows(&dom).into_iter().map(|r| r.0).collect();
    assert_eq!(got, harm.iter().cloned().collect());
    // The rule that holds: ship holds on the ready and the decided ones.
    let dom = dump_dom(&format!("{base}/?rule=ship&sort=id"), None);
    let got: Vec<String> = rows(&dom).into_iter().map(|r| r.0).collect();
    assert_eq!(got, ready);
    // A metric, 500 experiments over ten pages.
    let dom = dump_dom(&format!("{base}/?metric=refund&sort=id"), None);
    let p = showing(&dom);
    assert_eq!(attr(&p, "data-matched"), Some("500"));
    assert_eq!(attr(&p, "data-pages"), Some("10"));
    let want_refund: Vec<String> = (0..N).filter(|&i| has_refund(i)).map(id).take(50).collect();
    let got: Vec<String> = rows(&dom).into_iter().map(|r| r.0).collect();
    assert_eq!(got, want_refund);

    // A search by id.
    let dom = dump_dom(&format!("{base}/?q=4321"), None);
    assert_eq!(
        rows(&dom),
        [("orchard-4321".to_string(), "gathering".to_string())]
    );
    let dom = dump_dom(&format!("{base}/?q=ORCHARD-12"), None);
    let got: Vec<String> = rows(&dom).into_iter().map(|r| r.0).collect();
    assert_eq!(attr(&showing(&dom), "data-matched"), Some("100"));
    // Needs a person first: harm, data quality, ready, then gathering, then decided; by id
    // within each (open alerts tie at one or zero within a state here).
    let rank = |i: usize| match group(i) {
        Group::Harm => 0,
        Group::Quality => 1,
        Group::Ready if decided.contains(&id(i)) => 4,
        Group::Ready => 2,
        Group::Gathering => 3,
    };
    let mut want_search: Vec<usize> = (1200..1300).collect();
    want_search.sort_by_key(|&i| (rank(i), id(i)));
    let want_search: Vec<String> = want_search.into_iter().take(50).map(id).collect();
    assert_eq!(&want_search[..2], ["orchard-1207", "orchard-1261"]);
    assert_eq!(got, want_search);

    // The second page, through the page's own "next" link.
    let dom = dump_dom(&format!("{base}/"), None);
    let next = tags(&dom, "a", &[("data-role", "next-page")]);
    let href = attr(&next[0], "href").unwrap().replace("&amp;", "&");
    assert_eq!(href, "/?page=2");
    let dom = dump_dom(&format!("{base}{href}"), None);
    let gathering: Vec<String> = (0..N)
        .filter(|&i| group(i) == Group::Gathering)
        .map(id)
        .collect();
    let second: Vec<(String, String)> = rows(&dom);
    let want_second: Vec<(String, String)> = gathering[2..52]
        .iter()
        .map(|i| (i.clone(), "gathering".to_string()))
        .collect();
    assert_eq!(second, want_second);
    assert_eq!(attr(&showing(&dom), "data-page"), Some("2"));
    assert_eq!(tags(&dom, "a", &[("data-role", "previous-page")]).len(), 1);
    // The state chips carry words and a glyph class, never colour alone.
    assert!(dom.contains(r#"<span class="chip gathering">gathering evidence</span>"#));
}

fn definition() -> String {
    json!({
        "variants": [{"name": "control"}, {"name": "pear"}],
        "metric": [{"name": "sprouted", "kind": "conversion"}],
    })
    .to_string()
}

fn put(svc: &Service, id: &str) {
    let r = client()
        .put(svc.url(&format!("/v1/experiments/{id}")))
        .header("content-type", "application/json")
        .body(definition())
        .send()
        .unwrap();
    assert_eq!(r.status().as_u16(), 201, "PUT {id}");
}

fn delete(svc: &Service, id: &str) {
    let r = client()
        .delete(svc.url(&format!("/v1/experiments/{id}")))
        .send()
        .unwrap();
    assert_eq!(r.status().as_u16(), 200, "DELETE {id}");
}

#[test]
fn paging_sees_every_experiment_once_while_others_come_and_go() {
    let mut config = String::from("[http]\naddr = \"127.0.0.1:0\"\n\n");
    for i in 0..150 {
        config.push_str(&format!(
            "[[experiment]]\nid = \"walk-{:03}\"\nvariants = [ {{ name = \"control\" }}, {{ name = \"pear\" }} ]\n[[experiment.metric]]\nname = \"sprouted\"\nkind = \"conversion\"\n\n",
            i * 2
        ));
    }
    let svc = Service::start(&config);
    // Experiments defined over the API before the walk; some are deleted during it.
    let doomed: Vec<String> = (0..60).map(|i| format!("walk-{:03}x", i * 5)).collect();
    for d in &doomed {
        put(&svc, d);
    }
    let before: BTreeSet<String> = walk(&svc, "/v1/experiments?limit=1000", "experiments")
        .iter()
        .map(|e| e["id"].as_str().unwrap().to_string())
        .collect();
    assert_eq!(before.len(), 210);

    let mut seen: BTreeMap<String, usize> = BTreeMap::new();
    let mut deleted_at: BTreeMap<String, String> = BTreeMap::new(); // id → cursor id then
    let mut created_at: BTreeMap<String, String> = BTreeMap::new();
    let mut cursor_id = String::new();
    let mut after: Option<String> = None;
    let mut pages = 0;
    let mut matched = Vec::new();
    loop {
        let path = match &after {
            None => "/v1/experiments?limit=7".to_string(),
            Some(c) => format!("/v1/experiments?limit=7&after={c}"),
        };
        let (status, page) = svc.get(&path);
        assert_eq!(status, 200, "{page}");
        assert_eq!(page["limit"], 7);
        matched.push(page["matched"].as_u64().unwrap());
        let list = page["experiments"].as_array().unwrap();
        assert!(list.len() <= 7);
        for e in list {
            let id = e["id"].as_str().unwrap().to_string();
            assert!(
                id > cursor_id,
                "ids rise across pages: {id} after {cursor_id}"
            );
            cursor_id = id.clone();
            *seen.entry(id).or_default() += 1;
        }
        pages += 1;
        // Between pages: create one experiment on each side of the cursor and delete one
        // that was defined before the walk.
        let k = pages;
        for name in [
            format!("walk-{:03}n", (k * 13) % 300),
            format!("walk-{:03}m", (k * 29 + 7) % 300),
        ] {
            if !before.contains(&name) && !created_at.contains_key(&name) {
                put(&svc, &name);
                created_at.insert(name, cursor_id.clone());
            }
        }
        let d = doomed[(k * 7) % doomed.len()].clone();
        if let std::collections::btree_map::Entry::Vacant(slot) = deleted_at.entry(d) {
            delete(&svc, slot.key());
            slot.insert(cursor_id.clone());
        }
        match page["next"].as_str() {
            Some(c) => after = Some(c.to_string()),
            None => break,
        }
        assert!(pages < 200, "the walk ends");
    }
    assert!(pages > 25, "a long walk: {pages} pages");
    assert!(
        deleted_at.len() > 10 && created_at.len() > 20,
        "experiments came and went"
    );
    assert!(
        matched.windows(2).any(|w| w[0] != w[1]),
        "the fleet changed during the walk"
    );
    // Nothing twice.
    for (id, n) in &seen {
        assert_eq!(*n, 1, "{id} seen {n} times");
    }
    // Everything that existed for the whole walk, exactly once.
    for id in before.iter().filter(|i| !deleted_at.contains_key(*i)) {
        assert!(
            seen.contains_key(id),
            "{id} existed throughout and was never served"
        );
    }
    // Deleted before the cursor reached it: never served. Created ahead of the cursor:
    // served; created behind it: not (the walk had passed that place).
    for (id, cursor) in &deleted_at {
        if id > cursor {
            assert!(!seen.contains_key(id), "{id} was served after its deletion");
        }
    }
    for (id, cursor) in &created_at {
        assert_eq!(
            seen.contains_key(id),
            id > cursor,
            "{id} created at cursor {cursor}"
        );
    }
    // And the walk agrees with one big page taken now.
    let now: BTreeSet<String> = walk(&svc, "/v1/experiments?limit=1000", "experiments")
        .iter()
        .map(|e| e["id"].as_str().unwrap().to_string())
        .collect();
    let survivors: BTreeSet<String> = before
        .iter()
        .filter(|i| !deleted_at.contains_key(*i))
        .chain(created_at.keys())
        .cloned()
        .collect();
    assert_eq!(now, survivors);
}
