//! The HTTP API over real HTTP against the real binary: bearer tokens, the one error shape,
//! limits and timeouts, experiments defined at run time (kept across a restart, carried to
//! other instances by the changelog on a real broker), and
//! the OpenAPI document — every route described (checked against the router's source), every
//! recorded reply validated against its schema by the independent Python `jsonschema`
//! package, and schemathesis (PyPI) fuzzing a running instance.

mod common;

use std::io::{Read, Write};
use std::path::Path;
use std::process::Command;
use std::time::Duration;

use common::{client, Service};
use serde_json::{json, Value};

const TOKEN_A: &str = "crumb-ops-7c1f9e2a4b6d8e0f";
const TOKEN_B: &str = "orchard-ci-3a5b7c9d1e2f4a6b";

const CONFIG: &str = r#"
[http]
addr = "127.0.0.1:0"

[[experiment]]
id = "crumb-checkout-copy"
variants = [ { name = "control" }, { name = "short-copy" } ]
[[experiment.metric]]
name = "purchase"
kind = "conversion"
"#;

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

/// Talks to a service and records every reply for the schema check.
struct Api {
    svc: Service,
    token: Option<&'static str>,
    recorded: Vec<Value>,
}

struct Reply {
    status: u16,
    body: Value,
    headers: reqwest::header::HeaderMap,
}

impl Api {
    fn new(svc: Service, token: Option<&'static str>) -> Api {
        Api {
            svc,
            token,
            recorded: Vec::new(),
        }
    }

    /// `route` is the path template of the OpenAPI document, `path` the concrete path.
    fn call(&mut self, method: &str, route: &str, path: &str, body: Option<String>) -> Reply {
        self.call_as(method, route, path, body, self.token)
    }

    fn call_as(
        &mut self,
        method: &str,
        route: &str,
        path: &str,
        body: Option<String>,
        token: Option<&str>,
    ) -> Reply {
        let mut req = client().request(method.parse().unwrap(), self.svc.url(path));
        if let Some(t) = token {
            req = req.bearer_auth(t);
        }
        if let Some(b) = body {
            req = req.header("content-type", "application/json").body(b);
        }
        let r = req.send().expect("request");
        let status = r.status().as_u16();
        let headers = r.headers().clone();
        let ctype = headers
            .get("content-type")
            .and_then(|v| v.to_str().ok())
            .unwrap_or("")
            .to_string();
        let text = r.text().unwrap();
        self.recorded.push(json!({
            "method": method, "route": route, "status": status,
            "content_type": ctype, "body": text,
        }));
        let body = serde_json::from_str(&text).unwrap_or(Value::Null);
        Reply {
            status,
            body,
            headers,
        }
    }

    /// Every recorded reply against the OpenAPI document, by tests/tools/check_responses.py.
    fn check_schemas(&self) {
        let dir = tempfile::tempdir().unwrap();
        let file = dir.path().join("recorded.json");
        std::fs::write(&file, serde_json::to_vec(&self.recorded).unwrap()).unwrap();
        let out = Command::new("python3")
            .arg(root().join("tests/tools/check_responses.py"))
            .arg(root().join("src/http/openapi.json"))
            .arg(&file)
            .output()
            .expect("python3");
        let report = String::from_utf8_lossy(&out.stdout);
        assert!(
            out.status.success(),
            "replies that do not fit the OpenAPI schemas:\n{report}{}",
            String::from_utf8_lossy(&out.stderr)
        );
        println!("schema check: {}", report.trim());
    }
}

/// The one error shape: `{"error":{"code","message","details"}}`, with the expected code.
fn assert_error(r: &Reply, status: u16, code: &str) {
    assert_eq!(r.status, status, "status of a `{code}` reply");
    let e = &r.body["error"];
    assert_eq!(e["code"], code, "error code");
    assert!(e["message"].as_str().is_some_and(|m| !m.is_empty()));
    assert!(e.get("details").is_some(), "details present (may be null)");
    assert!(r.headers.contains_key("x-request-id"));
}

const T: &str = "2026-03-14T09:26:53Z";

fn exposure(exp: &str, variant: &str, unit: &str) -> Value {
    json!({"type": "exposure", "experiment": exp, "variant": variant, "unit": unit, "time": T})
}

fn conversion(exp: &str, metric: &str, unit: &str) -> Value {
    json!({"type": "conversion", "experiment": exp, "metric": metric, "unit": unit, "time": T})
}

fn planter_tray(variants: &[&str], metrics: &[(&str, &str)]) -> Value {
    json!({
        "variants": variants.iter().map(|v| json!({"name": v})).collect::<Vec<_>>(),
        "metric": metrics.iter().map(|(n, k)| json!({"name": n, "kind": k})).collect::<Vec<_>>(),
    })
}

#[test]
fn writes_need_a_token_and_reads_are_open_by_default() {
    let svc = Service::start_with_env(
        CONFIG,
        &[("POSTERIORD_API_TOKENS", &format!("{TOKEN_A}, {TOKEN_B}"))],
    );
    let mut api = Api::new(svc, None);
    let events = Some(json!([exposure("crumb-checkout-copy", "control", "s-1")]).to_string());
    let r = api.call("POST", "/v1/events", "/v1/events", events.clone());
    assert_error(&r, 401, "unauthenticated");
    assert_eq!(r.headers["www-authenticate"], "Bearer");
    let r = api.call_as(
        "POST",
        "/v1/events",
        "/v1/events",
        events.clone(),
        Some("crumb-ops-not-a-real-token"),
    );
    assert_error(&r, 403, "forbidden");
    // Only the Bearer scheme counts.
    let r = client()
        .post(api.svc.url("/v1/events"))
        .header("authorization", format!("Basic {TOKEN_A}"))
        .body(events.clone().unwrap())
        .send()
        .unwrap();
    assert_eq!(r.status().as_u16(), 401);
    // Either configured token works.
    for t in [TOKEN_A, TOKEN_B] {
        let r = api.call_as("POST", "/v1/events", "/v1/events", events.clone(), Some(t));
        assert_eq!(r.status, 200, "{}", r.body);
    }
    let r = api.call_as(
        "PUT",
        "/v1/experiments/{id}",
        "/v1/experiments/orchard-sprout-tray",
        Some(planter_tray(&["control", "tray"], &[("plant", "conversion")]).to_string()),
        None,
    );
    assert_error(&r, 401, "unauthenticated");
    let r = api.call_as(
        "DELETE",
        "/v1/experiments/{id}",
        "/v1/experiments/orchard-sprout-tray",
        None,
        None,
    );
    assert_error(&r, 401, "unauthenticated");
    let r = api.call_as(
        "POST",
        "/v1/alerts/{id}/ack",
        "/v1/alerts/a-1/ack",
        None,
        None,
    );
    assert_error(&r, 401, "unauthenticated");
    // Reads stay open.
    let r = api.call(
        "GET",
        "/v1/experiments/{id}",
        "/v1/experiments/crumb-checkout-copy",
        None,
    );
    assert_eq!(r.status, 200);
    assert_eq!(r.body["variants"][0]["units"], 1, "one exposure applied");
    assert_eq!(
        api.call("GET", "/v1/experiments", "/v1/experiments", None)
            .status,
        200
    );
    assert_eq!(
        api.call("GET", "/v1/alerts", "/v1/alerts", None).status,
        200
    );
    assert_eq!(api.call("GET", "/metrics", "/metrics", None).status, 200);
    let log = api.svc.log_text();
    assert!(
        !log.contains(TOKEN_A) && !log.contains(TOKEN_B),
        "a token reached the log"
    );
    assert!(
        log.contains("API writes need a bearer token"),
        "start-up says so"
    );
    api.check_schemas();
}

#[test]
fn protected_reads_need_a_token_too_and_probes_stay_open() {
    let dir = tempfile::tempdir().unwrap();
    let tokens = dir.path().join("tokens");
    std::fs::write(
        &tokens,
        format!("# rotated 2026-03\n{TOKEN_A}\n\n{TOKEN_B}\n"),
    )
    .unwrap();
    let config = CONFIG.replace(
        "addr = \"127.0.0.1:0\"",
        &format!(
            "addr = \"127.0.0.1:0\"\ntoken_file = {:?}\nprotect_reads = true",
            tokens.display().to_string()
        ),
    );
    let mut api = Api::new(Service::start(&config), None);
    for (route, path) in [
        ("/v1/experiments", "/v1/experiments"),
        (
            "/v1/experiments/{id}",
            "/v1/experiments/crumb-checkout-copy",
        ),
        ("/v1/alerts", "/v1/alerts"),
        ("/metrics", "/metrics"),
    ] {
        assert_error(&api.call("GET", route, path, None), 401, "unauthenticated");
        let r = api.call_as("GET", route, path, None, Some(TOKEN_B));
        assert_eq!(r.status, 200, "{path} with a token");
    }
    for (route, path) in [
        ("/healthz", "/healthz"),
        ("/readyz", "/readyz"),
        ("/v1/openapi.json", "/v1/openapi.json"),
    ] {
        assert_eq!(
            api.call("GET", route, path, None).status,
            200,
            "{path} is open"
        );
    }
    api.check_schemas();
}

#[test]
fn without_a_token_only_loopback_is_served() {
    // Loopback without a token: writes are accepted, and start-up says why.
    let mut api = Api::new(Service::start(CONFIG), None);
    let r = api.call(
        "POST",
        "/v1/events",
        "/v1/events",
        Some(json!([exposure("crumb-checkout-copy", "control", "s-1")]).to_string()),
    );
    assert_eq!(r.status, 200);
    assert!(api.svc.log_text().contains("loopback"));
    // Any other address without a token: refused before serving anything.
    let dir = tempfile::tempdir().unwrap();
    let path = dir.path().join("c.toml");
    std::fs::write(&path, CONFIG.replace("127.0.0.1:0", "0.0.0.0:0")).unwrap();
    let out = Command::new(common::bin())
        .args(["serve", "--config"])
        .arg(&path)
        .env("POSTERIORD_STORE_DIR", dir.path().join("state"))
        .env_remove("POSTERIORD_API_TOKENS")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2), "a configuration error");
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("refusing to listen on 0.0.0.0"), "{err}");
    assert!(err.contains("POSTERIORD_API_TOKENS"), "{err}");
    // check-config says so before a deployment does.
    let out = Command::new(common::bin())
        .args(["check-config"])
        .arg(&path)
        .env_remove("POSTERIORD_API_TOKENS")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("refusing to listen"));
    // Short tokens are refused with the key named and the token not shown.
    let out = Command::new(common::bin())
        .args(["check-config"])
        .arg(&path)
        .env("POSTERIORD_API_TOKENS", "pumpkin")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("POSTERIORD_API_TOKENS") && !err.contains("pumpkin"),
        "{err}"
    );
}

#[test]
fn every_error_has_the_one_json_shape() {
    let config = CONFIG.replace(
        "addr = \"127.0.0.1:0\"",
        "addr = \"127.0.0.1:0\"\nmax_body_bytes = 2048\nrequest_timeout_secs = 1",
    );
    let mut api = Api::new(Service::start(&config), None);
    // An unknown route (not in the document, so checked here rather than by the schemas).
    let r = client().get(api.svc.url("/v1/nothing")).send().unwrap();
    assert_eq!(r.status().as_u16(), 404);
    assert_eq!(r.json::<Value>().unwrap()["error"]["code"], "not_found");
    let r = api.call(
        "GET",
        "/v1/experiments/{id}",
        "/v1/experiments/no-such",
        None,
    );
    assert_error(&r, 404, "unknown_experiment");
    let r = api.call(
        "GET",
        "/v1/experiments",
        "/v1/experiments?archived=maybe",
        None,
    );
    assert_error(&r, 400, "bad_request");
    let r = api.call("GET", "/v1/alerts", "/v1/alerts?state=sleepy", None);
    assert_error(&r, 400, "bad_filter");
    let r = api.call(
        "GET",
        "/v1/experiments/{id}",
        "/v1/experiments/crumb-checkout-copy?archived=true&archive=-3",
        None,
    );
    assert_error(&r, 400, "bad_request");
    let r = api.call("POST", "/v1/alerts/{id}/ack", "/v1/alerts/nope/ack", None);
    assert_error(&r, 404, "unknown_alert");
    let r = api.call("POST", "/v1/events", "/v1/events", Some(" \n".into()));
    assert_error(&r, 400, "bad_body");
    let r = api.call("POST", "/v1/events", "/v1/events", Some("x".repeat(4096)));
    assert_error(&r, 413, "too_large");
    // Wrong method: 405 (not described per route, so not schema-recorded).
    let r = client()
        .patch(api.svc.url("/v1/experiments"))
        .send()
        .unwrap();
    assert_eq!(r.status().as_u16(), 405);
    let body: Value = r.json().unwrap();
    assert_eq!(body["error"]["code"], "method_not_allowed");
    // A body that never finishes arriving: 408 after request_timeout_secs, as JSON.
    let addr = api.svc.base.trim_start_matches("http://").to_string();
    let mut s = std::net::TcpStream::connect(&addr).unwrap();
    s.set_read_timeout(Some(Duration::from_secs(10))).unwrap();
    write!(
        s,
        "POST /v1/events HTTP/1.1\r\nhost: {addr}\r\ncontent-type: application/json\r\ncontent-length: 1000\r\n\r\n[{{"
    )
    .unwrap();
    let mut reply = String::new();
    let _ = s.read_to_string(&mut reply);
    assert!(reply.starts_with("HTTP/1.1 408"), "{reply}");
    assert!(reply.contains(r#""code":"timeout""#), "{reply}");
    // A client's own request id is kept; otherwise one is made.
    let r = client()
        .get(api.svc.url("/healthz"))
        .header("x-request-id", "crumb-trace-77")
        .send()
        .unwrap();
    assert_eq!(r.headers()["x-request-id"], "crumb-trace-77");
    api.check_schemas();
}

#[test]
fn experiments_defined_at_run_time_persist_extend_restart_and_archive() {
    let state = tempfile::tempdir().unwrap();
    let svc = Service::start_in(CONFIG, Some(state.path()), &[]);
    let mut api = Api::new(svc, None);
    let (route, path) = (
        "/v1/experiments/{id}",
        "/v1/experiments/orchard-sprout-tray",
    );
    let put = |api: &mut Api, body: Value| api.call("PUT", route, path, Some(body.to_string()));

    let r = put(
        &mut api,
        planter_tray(&["control", "tray"], &[("plant", "conversion")]),
    );
    assert_eq!(r.status, 201, "{}", r.body);
    assert_eq!(r.body["created"], true);
    assert_eq!(r.body["experiment"]["source"], "api");
    let events: Vec<Value> = vec![
        exposure("orchard-sprout-tray", "control", "g-1"),
        exposure("orchard-sprout-tray", "tray", "g-2"),
        exposure("orchard-sprout-tray", "tray", "g-3"),
        conversion("orchard-sprout-tray", "plant", "g-2"),
    ];
    let r = api.call(
        "POST",
        "/v1/events",
        "/v1/events",
        Some(Value::Array(events).to_string()),
    );
    assert_eq!(r.body["applied"], 4, "{}", r.body);

    // Appending a variant and a metric keeps the counts.
    let r = put(
        &mut api,
        planter_tray(
            &["control", "tray", "tray-xl"],
            &[("plant", "conversion"), ("app-crash", "defect_rate")],
        ),
    );
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(r.body["added_variants"], json!(["tray-xl"]));
    assert_eq!(r.body["added_metrics"], json!(["app-crash"]));
    let doc = api.call("GET", route, path, None).body;
    assert_eq!(doc["variants"][1]["units"], 2);
    assert_eq!(doc["metrics"][0]["variants"][1]["successes"], 1);
    assert_eq!(doc["metrics"][1]["variants"][1]["exposure"], 2.0);

    // Changing a running metric's prior needs "restart": true.
    let mut reprior = planter_tray(
        &["control", "tray", "tray-xl"],
        &[("plant", "conversion"), ("app-crash", "defect_rate")],
    );
    reprior["metric"][0]["prior"] = json!({"alpha": 2, "beta": 30});
    let r = put(&mut api, reprior.clone());
    assert_error(&r, 409, "restart_required");
    assert!(r.body["error"]["details"]["reason"]
        .as_str()
        .unwrap()
        .contains("prior"));
    reprior["restart"] = json!(true);
    let r = put(&mut api, reprior);
    assert_eq!(r.status, 200, "{}", r.body);
    assert_eq!(
        (r.body["restarted"].clone(), r.body["archived"].clone()),
        (json!(true), json!(1))
    );
    assert_eq!(
        api.call("GET", route, path, None).body["variants"][1]["units"],
        0
    );
    let old = api.call(
        "GET",
        route,
        &format!("{path}?archived=true&archive=1"),
        None,
    );
    assert_eq!(old.status, 200);
    assert_eq!(
        old.body["variants"][1]["units"], 2,
        "the archive keeps the state"
    );
    assert_eq!(old.body["archive"]["reason"], "restarted");

    // Errors name the JSON key; the file's experiments are not the API's to change.
    let mut bad = planter_tray(&["control", "tray"], &[("plant", "conversion")]);
    bad["variants"][1]["weight"] = json!(-0.5);
    let r = api.call(
        "PUT",
        route,
        "/v1/experiments/orchard-bad",
        Some(bad.to_string()),
    );
    assert_error(&r, 422, "invalid_experiment");
    assert_eq!(r.body["error"]["details"]["key"], "variants[1].weight");
    let r = api.call(
        "PUT",
        route,
        "/v1/experiments/orchard-bad",
        Some("{".into()),
    );
    assert_error(&r, 400, "bad_body");
    let huge = json!({"variants": [{"name": "x".repeat(1_100_000)}]}).to_string();
    let r = api.call("PUT", route, "/v1/experiments/orchard-bad", Some(huge));
    assert_error(&r, 413, "too_large");
    let r = api.call(
        "PUT",
        route,
        "/v1/experiments/crumb-checkout-copy",
        Some(planter_tray(&["a", "b"], &[("m", "conversion")]).to_string()),
    );
    assert_error(&r, 409, "defined_in_config");
    let r = api.call("DELETE", route, "/v1/experiments/crumb-checkout-copy", None);
    assert_error(&r, 409, "defined_in_config");

    // A second API experiment with state, then a restart of the process.
    let mulch = "/v1/experiments/orchard-mulch";
    let r = api.call(
        "PUT",
        route,
        mulch,
        Some(planter_tray(&["control", "mulch"], &[("plant", "conversion")]).to_string()),
    );
    assert_eq!(r.status, 201);
    let r = api.call(
        "POST",
        "/v1/events",
        "/v1/events",
        Some(json!([exposure("orchard-mulch", "mulch", "g-9")]).to_string()),
    );
    assert_eq!(r.body["applied"], 1);
    // Its gauges are scraped while it runs, and gone once it is archived.
    let series = r#"experiment="orchard-sprout-tray""#;
    assert!(api.svc.get_text("/metrics").1.contains(series));
    let r = api.call("DELETE", route, path, None);
    assert_eq!(r.status, 200, "{}", r.body);
    assert!(!api.svc.get_text("/metrics").1.contains(series));
    assert_eq!(r.body["archived"]["archive"]["number"], 2);
    assert_error(
        &api.call("DELETE", route, path, None),
        404,
        "unknown_experiment",
    );
    assert_error(
        &api.call("GET", route, path, None),
        404,
        "unknown_experiment",
    );
    api.check_schemas();
    assert!(api.svc.terminate(Duration::from_secs(20)).success());

    let mut api = Api::new(Service::start_in(CONFIG, Some(state.path()), &[]), None);
    let doc = api.call("GET", route, mulch, None);
    assert_eq!(doc.status, 200, "the API experiment survives a restart");
    assert_eq!(doc.body["variants"][1]["units"], 1, "with its state");
    let archived = api.call(
        "GET",
        "/v1/experiments",
        "/v1/experiments?archived=true",
        None,
    );
    let numbers: Vec<&Value> = archived.body["experiments"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| &e["archive"]["number"])
        .collect();
    assert_eq!(numbers, [&json!(1), &json!(2)]);
    // A re-created id starts empty: stored state of an older generation never returns.
    let r = put(
        &mut api,
        planter_tray(&["control", "tray"], &[("plant", "conversion")]),
    );
    assert_eq!(r.status, 201);
    assert_eq!(r.body["experiment"]["units"], 0);
    api.check_schemas();
    assert!(api.svc.terminate(Duration::from_secs(20)).success());

    // The config file now defines orchard-mulch too: the file wins, and start-up says so.
    let clash = format!(
        "{CONFIG}\n[[experiment]]\nid = \"orchard-mulch\"\nvariants = [ {{ name = \"a\" }}, {{ name = \"b\" }} ]\n[[experiment.metric]]\nname = \"plant\"\nkind = \"conversion\"\n"
    );
    let mut api = Api::new(Service::start_in(&clash, Some(state.path()), &[]), None);
    let doc = api.call("GET", route, mulch, None).body;
    assert_eq!(doc["source"], "config");
    assert_eq!(doc["variants"][0]["name"], "a");
    assert!(api
        .svc
        .log_text()
        .contains("config file's definition is used"));
    api.check_schemas();
}

/// A SIGKILL right after a restart over the API: the new generation is in force after the
/// crash and starts empty, and the old state (stored with the HTTP shard before the restart)
/// is in the archive, not back in the experiment.
#[test]
fn a_crash_after_a_restart_never_brings_the_old_state_back() {
    let state = tempfile::tempdir().unwrap();
    let config = format!("{CONFIG}\n[store]\nsnapshot_interval_ms = 200\n");
    let mut api = Api::new(Service::start_in(&config, Some(state.path()), &[]), None);
    let (route, path) = (
        "/v1/experiments/{id}",
        "/v1/experiments/orchard-sprout-tray",
    );
    let body = planter_tray(&["control", "tray"], &[("plant", "conversion")]);
    assert_eq!(
        api.call("PUT", route, path, Some(body.to_string())).status,
        201
    );
    let events = json!([
        exposure("orchard-sprout-tray", "control", "g-1"),
        exposure("orchard-sprout-tray", "tray", "g-2"),
    ]);
    let r = api.call("POST", "/v1/events", "/v1/events", Some(events.to_string()));
    assert_eq!(r.body["applied"], 2);
    // Let the HTTP shard be stored with the old generation's state.
    std::thread::sleep(Duration::from_millis(800));
    let mut restart = body.clone();
    restart["restart"] = json!(true);
    assert_eq!(
        api.call("PUT", route, path, Some(restart.to_string())).body["archived"],
        1
    );
    api.svc.child.kill().unwrap();
    api.svc.child.wait().unwrap();
    let mut api = Api::new(Service::start_in(&config, Some(state.path()), &[]), None);
    let now = api.call("GET", route, path, None).body;
    assert_eq!(now["generation"], 2);
    assert_eq!(
        now["variants"][0]["units"], 0,
        "the new generation starts empty"
    );
    let old = api
        .call("GET", route, &format!("{path}?archived=true"), None)
        .body;
    assert_eq!(
        old["variants"][0]["units"], 1,
        "the archive holds the old state"
    );
    assert_eq!(old["variants"][1]["units"], 1);
    api.check_schemas();
}

/// Every route the router registers (read from the sources under src/http/) is described in
/// the OpenAPI document with the same methods, and the served document is the file.
#[test]
fn the_openapi_document_describes_every_route() {
    let mut src = String::new();
    let mut files = Vec::new();
    let mut dirs = vec![root().join("src/http")];
    while let Some(dir) = dirs.pop() {
        for f in std::fs::read_dir(dir).unwrap() {
            let p = f.unwrap().path();
            if p.is_dir() {
                dirs.push(p);
            } else {
                files.push(p);
            }
        }
    }
    for p in files {
        if p.extension().is_some_and(|e| e == "rs") {
            // Each file's routes end at its fallback or at its end; unit tests do not count.
            let text = std::fs::read_to_string(&p).unwrap();
            src.push_str(text.split("#[cfg(test)]").next().unwrap());
            src.push_str("\n.fallback(\n");
        }
    }
    let doc: Value = serde_json::from_str(
        &std::fs::read_to_string(root().join("src/http/openapi.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(doc["openapi"], "3.1.0");
    let mut routes = Vec::new();
    for chunk in src.split(".route(").skip(1) {
        let path = chunk.split('"').nth(1).unwrap().to_string();
        // The handler expression runs to the next `.route(` or the fallback.
        let expr = chunk.split(".fallback(").next().unwrap();
        let mut methods: Vec<&str> = ["get", "put", "post", "delete", "patch"]
            .into_iter()
            .filter(|m| expr.contains(&format!("{m}(")) || expr.contains(&format!(".{m}(")))
            .collect();
        methods.sort();
        routes.push((path, methods));
    }
    assert!(routes.len() >= 9, "found the router's routes: {routes:?}");
    for (path, methods) in &routes {
        let item = doc["paths"]
            .get(path)
            .unwrap_or_else(|| panic!("{path} is not described in src/http/openapi.json"));
        for m in methods {
            assert!(
                item.get(*m).is_some(),
                "{} {path} is not described",
                m.to_uppercase()
            );
        }
    }
    for (path, item) in doc["paths"].as_object().unwrap() {
        let registered = routes.iter().find(|(p, _)| p == path);
        let registered = registered.unwrap_or_else(|| panic!("{path} is described but not routed"));
        for m in item
            .as_object()
            .unwrap()
            .keys()
            .filter(|k| *k != "parameters")
        {
            assert!(
                registered.1.contains(&m.as_str()),
                "{m} {path} is described but not routed"
            );
        }
    }
    let svc = Service::start(CONFIG);
    let (status, served) = svc.get("/v1/openapi.json");
    assert_eq!(status, 200);
    assert_eq!(served, doc);
}

/// schemathesis (PyPI, pinned in tests/run.sh) generates requests from the OpenAPI document
/// against a running instance with tokens and protected reads; it must find no server error
/// and no reply that breaks the document (status, content type, headers, schema).
#[test]
fn schemathesis_finds_no_server_error_and_no_schema_violation() {
    let config = CONFIG.replace(
        "addr = \"127.0.0.1:0\"",
        "addr = \"127.0.0.1:0\"\nprotect_reads = true",
    );
    let svc = Service::start_with_env(&config, &[("POSTERIORD_API_TOKENS", TOKEN_A)]);
    let work = tempfile::tempdir().unwrap();
    // Through Python rather than the `schemathesis` script, which pip may put off PATH.
    let out = Command::new("python3")
        .args([
            "-c",
            "import sys; from schemathesis.cli import schemathesis; sys.argv[0] = 'schemathesis'; schemathesis()",
            "run",
        ])
        .arg(svc.url("/v1/openapi.json"))
        .args([
            "--checks",
            "not_a_server_error,status_code_conformance,content_type_conformance,response_headers_conformance,response_schema_conformance",
            "--max-examples",
            "25",
            "--seed",
            "20260314",
            "--header",
        ])
        .arg(format!("Authorization: Bearer {TOKEN_A}"))
        .env("NO_COLOR", "1")
        // schemathesis keeps a cache in its working directory; not in the repository.
        .current_dir(work.path())
        .output()
        .expect("schemathesis is installed by tests/run.sh");
    let report = String::from_utf8_lossy(&out.stdout);
    let tail: String = report
        .lines()
        .rev()
        .take(40)
        .collect::<Vec<_>>()
        .into_iter()
        .rev()
        .collect::<Vec<_>>()
        .join("\n");
    assert!(
        out.status.success(),
        "schemathesis failed:\n{tail}\n{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(report.contains("passed"), "{tail}");
    assert!(!svc.log_text().contains(TOKEN_A), "a token reached the log");
    println!("{tail}");
}

fn kafka_rejects(svc: &Service) -> u64 {
    svc.metric_sum("posteriord_events_rejected_total", r#"source="kafka""#)
}

/// Two instances in one consumer group (real broker): experiments defined over the API on
/// one reach the other through the changelog, so their events are counted on every partition
/// and none is refused; a third instance that starts later learns them before consuming; a
/// deletion travels the same way and archives the state where it is held.
#[test]
fn definitions_travel_between_instances_on_the_changelog() {
    use common::kafka::{brokers, produce, unique};
    let brokers = brokers();
    let topic = unique("api-events");
    let group = unique("api-group");
    let scratch = tempfile::tempdir().unwrap();
    let seed = [exposure("crumb-checkout-copy", "control", "s-0").to_string()];
    assert_eq!(produce(&brokers, &topic, 4, &seed, scratch.path()), 1);
    let experiments = CONFIG.split("[[experiment]]").nth(1).unwrap();
    let config = common::kafka::service_config(
        &brokers,
        &topic,
        &group,
        6000,
        &format!("[[experiment]]{experiments}"),
    );
    let dir = |i: usize| scratch.path().join(format!("state-{i}"));
    let a = Service::start_in(&config, Some(&dir(0)), &[]);
    let b = Service::start_in(&config, Some(&dir(1)), &[]);
    for s in [&a, &b] {
        common::wait_for(Duration::from_secs(60), "readiness", || {
            (s.get("/readyz").0 == 200).then_some(())
        });
    }
    let ids: Vec<String> = (0..4).map(|i| format!("orchard-tray-{i}")).collect();
    let mut api_a = Api::new(a, None);
    for id in &ids {
        let r = api_a.call(
            "PUT",
            "/v1/experiments/{id}",
            &format!("/v1/experiments/{id}"),
            Some(planter_tray(&["control", "tray"], &[("plant", "conversion")]).to_string()),
        );
        assert_eq!(r.status, 201, "{}", r.body);
    }
    for id in &ids {
        // Generous: on a broker that has just started, the changelog topic's first
        // publication can take a while (this test failed once right after a broker start).
        common::wait_for(
            Duration::from_secs(90),
            "the definition on the other instance",
            || (b.get(&format!("/v1/experiments/{id}")).0 == 200).then_some(()),
        );
    }
    // Events keyed by experiment id spread the four experiments over the partitions.
    let lines: Vec<String> = ids
        .iter()
        .flat_map(|id| {
            (0..10).map(move |u| {
                let v = if u % 2 == 0 { "control" } else { "tray" };
                exposure(id, v, &format!("g-{u}")).to_string()
            })
        })
        .collect();
    assert_eq!(produce(&brokers, &topic, 4, &lines, scratch.path()), 40);
    for s in [&api_a.svc, &b] {
        for id in &ids {
            common::wait_for(Duration::from_secs(60), "every event counted", || {
                let (_, d) = s.get(&format!("/v1/experiments/{id}"));
                (d["variants"][0]["units"] == 5 && d["variants"][1]["units"] == 5).then_some(())
            });
        }
        assert_eq!(kafka_rejects(s), 0, "no event refused");
    }
    // A later instance learns the definitions before it consumes anything.
    let c = Service::start_in(&config, Some(&dir(2)), &[]);
    common::wait_for(
        Duration::from_secs(60),
        "the third instance's catalog",
        || (c.get(&format!("/v1/experiments/{}", ids[0])).0 == 200).then_some(()),
    );
    // A deletion on B reaches A, which archives what it held.
    let r = client()
        .delete(b.url(&format!("/v1/experiments/{}", ids[3])))
        .send()
        .unwrap();
    assert_eq!(r.status().as_u16(), 200);
    common::wait_for(
        Duration::from_secs(30),
        "the deletion on the other instance",
        || (api_a.svc.get(&format!("/v1/experiments/{}", ids[3])).0 == 404).then_some(()),
    );
    let (_, archived) = api_a.svc.get("/v1/experiments?archived=true");
    assert!(archived["experiments"]
        .as_array()
        .unwrap()
        .iter()
        .any(|e| e["id"] == ids[3].as_str()));
    assert_eq!(kafka_rejects(&c), 0);
    api_a.check_schemas();
}

/// The lists page by cursor with their filters, refuse bad paging parameters with the one
/// error shape naming the parameter, and every reply (pages, errors, the overview's HTML)
/// fits the OpenAPI document.
#[test]
fn lists_page_by_cursor_with_filters_and_fit_the_schema() {
    let mut api = Api::new(Service::start(CONFIG), None);
    for id in [
        "orchard-tray-a",
        "orchard-tray-b",
        "orchard-pot-c",
        "orchard-tray-d",
    ] {
        let r = api.call(
            "PUT",
            "/v1/experiments/{id}",
            &format!("/v1/experiments/{id}"),
            Some(planter_tray(&["control", "tray"], &[("plant", "conversion")]).to_string()),
        );
        assert_eq!(r.status, 201, "{}", r.body);
    }
    // Two at a time, by id, to the end.
    let mut ids = Vec::new();
    let mut path = "/v1/experiments?limit=2".to_string();
    loop {
        let r = api.call("GET", "/v1/experiments", &path, None);
        assert_eq!(r.status, 200, "{}", r.body);
        assert_eq!(r.body["matched"], 5);
        assert_eq!(r.body["limit"], 2);
        for e in r.body["experiments"].as_array().unwrap() {
            ids.push(e["id"].as_str().unwrap().to_string());
            assert_eq!(e["state"], "gathering", "no data yet");
            assert_eq!(e["open_alerts"], 0);
        }
        match r.body["next"].as_str() {
            Some(c) => path = format!("/v1/experiments?limit=2&after={c}"),
            None => break,
        }
    }
    assert_eq!(
        ids,
        [
            "crumb-checkout-copy",
            "orchard-pot-c",
            "orchard-tray-a",
            "orchard-tray-b",
            "orchard-tray-d"
        ]
    );
    // Filters.
    let r = api.call(
        "GET",
        "/v1/experiments",
        "/v1/experiments?q=TRAY&metric=plant&sort=units",
        None,
    );
    assert_eq!(r.body["matched"], 3, "{}", r.body);
    let r = api.call(
        "GET",
        "/v1/experiments",
        "/v1/experiments?metric=purchase",
        None,
    );
    assert_eq!(r.body["experiments"][0]["id"], "crumb-checkout-copy");
    assert_eq!(r.body["matched"], 1);
    for q in ["state=harm", "rule=ship", "alerting=true"] {
        let r = api.call(
            "GET",
            "/v1/experiments",
            &format!("/v1/experiments?{q}"),
            None,
        );
        assert_eq!((r.status, &r.body["matched"]), (200, &json!(0)), "{q}");
        assert!(r.body["next"].is_null());
    }
    // Bad parameters, each named.
    let first = api.call("GET", "/v1/experiments", "/v1/experiments?limit=1", None);
    let cursor = first.body["next"].as_str().unwrap().to_string();
    for (q, param) in [
        ("limit=0".to_string(), "limit"),
        ("limit=1001".to_string(), "limit"),
        ("state=asleep".to_string(), "state"),
        ("rule=ship-it".to_string(), "rule"),
        ("sort=colour".to_string(), "sort"),
        ("after=not-a-cursor".to_string(), "after"),
        (format!("sort=units&after={cursor}"), "after"),
    ] {
        let r = api.call(
            "GET",
            "/v1/experiments",
            &format!("/v1/experiments?{q}"),
            None,
        );
        assert_error(&r, 400, "bad_filter");
        assert_eq!(r.body["error"]["details"]["parameter"], param, "{q}");
    }
    let r = api.call(
        "GET",
        "/v1/alerts",
        "/v1/alerts?limit=1&rule=harm&metric=plant",
        None,
    );
    assert_eq!(r.status, 200);
    assert_eq!(
        (&r.body["matched"], &r.body["next"]),
        (&json!(0), &Value::Null)
    );
    let r = api.call("GET", "/v1/alerts", "/v1/alerts?rule=teleport", None);
    assert_error(&r, 400, "bad_filter");
    let r = api.call("GET", "/v1/alerts", "/v1/alerts?after=opened~x", None);
    assert_error(&r, 400, "bad_filter");
    // The overview: counts and a bad filter, as HTML.
    let r = api.call("GET", "/", "/?q=tray&sort=id", None);
    assert_eq!(r.status, 200);
    let r = api.call("GET", "/", "/?state=asleep", None);
    assert_eq!(r.status, 400);
    api.check_schemas();
}
