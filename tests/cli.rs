//! Tests of the command line as a user runs it: `check-config` messages and exit codes, the
//! demo serving live experiments and stopping on its own or on SIGTERM.

mod common;

use std::process::{Command, Stdio};
use std::time::Duration;

use common::{bin, client, read_listen_line, signal, wait_exit, wait_for};
use serde_json::Value;

#[test]
fn check_config_accepts_the_example() {
    let example = concat!(env!("CARGO_MANIFEST_DIR"), "/config/example.toml");
    let out = Command::new(bin())
        .args(["check-config", example])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(String::from_utf8_lossy(&out.stdout).contains("ok (1 experiment"));
}

#[test]
fn check_config_names_a_typo_and_its_line_and_exits_2() {
    let dir = tempfile::tempdir().unwrap();
    let text = std::fs::read_to_string(concat!(env!("CARGO_MANIFEST_DIR"), "/config/example.toml"))
        .unwrap()
        .replace("variants = [", "varaints = [");
    let line = text
        .lines()
        .position(|l| l.starts_with("varaints"))
        .unwrap()
        + 1;
    let path = dir.path().join("typo.toml");
    std::fs::write(&path, text).unwrap();
    let out = Command::new(bin())
        .arg("check-config")
        .arg(&path)
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("varaints"), "{stderr}");
    assert!(stderr.contains(&format!("typo.toml:{line}:")), "{stderr}");
}

#[test]
fn check_config_of_a_missing_file_exits_2() {
    let out = Command::new(bin())
        .args(["check-config", "/nonexistent/p.toml"])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("cannot read"));
}

fn start_demo(extra: &[&str]) -> (std::process::Child, String, tempfile::TempDir) {
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("demo.log");
    let mut child = Command::new(bin())
        .args(["demo", "--addr", "127.0.0.1:0"])
        .args(extra)
        .current_dir(dir.path())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    let base = read_listen_line(&mut child, &log);
    // The first URL printed is the dashboard; keep the host part.
    let base = base.split("/v1/").next().unwrap().to_string();
    (child, base, dir)
}

#[test]
fn demo_serves_live_experiments_and_stops_after_its_duration() {
    let (mut child, base, _dir) = start_demo(&["--duration", "14", "--units-per-second", "200"]);
    let http = client();
    let doc: Value = wait_for(Duration::from_secs(5), "demo traffic", || {
        let doc: Value = http
            .get(format!("{base}/v1/experiments/crumb-delivery-banner"))
            .send()
            .ok()?
            .json()
            .ok()?;
        (doc["variants"][0]["units"].as_u64()? > 50).then_some(doc)
    });
    assert_eq!(doc["variants"].as_array().unwrap().len(), 3);
    let list: Value = http
        .get(format!("{base}/v1/experiments"))
        .send()
        .unwrap()
        .json()
        .unwrap();
    assert_eq!(list["experiments"].as_array().unwrap().len(), 4);
    let status =
        wait_exit(&mut child, Duration::from_secs(20)).expect("demo stops after --duration");
    assert!(status.success(), "{status:?}");
}

#[test]
fn demo_stops_cleanly_on_sigterm() {
    let (mut child, base, _dir) = start_demo(&[]);
    let ok = client()
        .get(format!("{base}/healthz"))
        .send()
        .unwrap()
        .status()
        .is_success();
    assert!(ok);
    signal(child.id(), "TERM");
    let status = wait_exit(&mut child, Duration::from_secs(20)).expect("demo exits on SIGTERM");
    assert!(status.success(), "{status:?}");
}

#[test]
fn demo_takes_its_address_from_posteriord_http_addr_like_serve() {
    // Without --addr the demo listens where POSTERIORD_HTTP_ADDR says (port 0 here, so not
    // the default 127.0.0.1:8080), as `serve` and the container image expect.
    let dir = tempfile::tempdir().unwrap();
    let log = dir.path().join("demo.log");
    let mut child = Command::new(bin())
        .arg("demo")
        .env("POSTERIORD_HTTP_ADDR", "127.0.0.1:0")
        .env_remove("POSTERIORD_API_TOKENS")
        .current_dir(dir.path())
        .stdout(Stdio::piped())
        .stderr(std::fs::File::create(&log).unwrap())
        .spawn()
        .unwrap();
    let base = read_listen_line(&mut child, &log);
    let base = base.split("/v1/").next().unwrap().to_string();
    assert!(base.starts_with("http://127.0.0.1:"), "{base}");
    assert!(
        !base.ends_with(":8080"),
        "the default address was used: {base}"
    );
    let status = client()
        .get(format!("{base}/healthz"))
        .send()
        .unwrap()
        .status();
    assert_eq!(status.as_u16(), 200);
    signal(child.id(), "TERM");
    let status = wait_exit(&mut child, Duration::from_secs(20)).expect("demo exits on SIGTERM");
    assert!(status.success(), "{status:?}");

    // A non-loopback address from the environment gets the same token guard as --addr.
    let out = Command::new(bin())
        .args(["demo", "--duration", "1"])
        .env("POSTERIORD_HTTP_ADDR", "0.0.0.0:0")
        .env_remove("POSTERIORD_API_TOKENS")
        .current_dir(dir.path())
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert_eq!(
        out.status.code(),
        Some(2),
        "0.0.0.0 without a token: {stderr}"
    );
    assert!(
        stderr.contains("refusing to listen on 0.0.0.0:0 without an API token"),
        "{stderr}"
    );
}

#[test]
fn with_the_brokers_unreachable_sigterm_still_drains_within_the_grace_period() {
    let dead = std::net::TcpListener::bind("127.0.0.1:0")
        .unwrap()
        .local_addr()
        .unwrap()
        .port();
    let config = format!(
        "[http]\naddr = \"127.0.0.1:0\"\n[shutdown]\ngrace_secs = 10\n[kafka]\nbrokers = \"127.0.0.1:{dead}\"\ntopics = [\"t\"]\n{}",
        common::TEST_EXPERIMENTS
    );
    let mut service = common::Service::start(&config);
    std::thread::sleep(Duration::from_millis(1500));
    let started = std::time::Instant::now();
    let status = service.terminate(Duration::from_secs(30));
    assert!(status.success(), "{}", service.log_text());
    assert!(
        started.elapsed() < Duration::from_secs(10),
        "drained in {:?}",
        started.elapsed()
    );
}

/// Runs posteriord with standard output on a real pipe whose reading end is already closed,
/// as after `| head -c 1` has read its byte and gone: every write fails with EPIPE. Returns
/// the exit code and standard error.
fn run_into_closed_pipe(args: &[&str], stdin: Option<&str>) -> (Option<i32>, String) {
    use std::io::Write;
    use std::os::fd::FromRawFd;
    let mut fds = [0; 2];
    // SAFETY: pipe(2) fills both descriptors on success; each is owned exactly once below.
    assert_eq!(unsafe { libc::pipe(fds.as_mut_ptr()) }, 0, "pipe(2)");
    // SAFETY: fds[0] and fds[1] are open descriptors that nothing else owns.
    let (reader, writer) = unsafe {
        (
            std::os::fd::OwnedFd::from_raw_fd(fds[0]),
            std::os::fd::OwnedFd::from_raw_fd(fds[1]),
        )
    };
    drop(reader);
    let mut child = Command::new(bin())
        .args(args)
        .stdin(if stdin.is_some() {
            Stdio::piped()
        } else {
            Stdio::null()
        })
        .stdout(Stdio::from(writer))
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    if let Some(text) = stdin {
        child
            .stdin
            .take()
            .unwrap()
            .write_all(text.as_bytes())
            .unwrap();
    }
    let out = child.wait_with_output().unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

#[test]
fn every_command_ends_quietly_with_exit_0_when_its_reader_closes_the_pipe() {
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("orchard.toml");
    std::fs::write(
        &config,
        format!(
            "{}\n[[source]]\nname = \"taps\"\nunit = \"who\"\ntime = \"at\"\nevent = \"what\"\nmetrics = {{ \"bought\" = \"purchase\" }}\n",
            common::TEST_EXPERIMENTS
        ),
    )
    .unwrap();
    let events = dir.path().join("events.ndjson");
    let mut lines = String::new();
    for i in 0..300 {
        for arm in ["control", "short-copy"] {
            lines.push_str(&format!(
                "{{\"type\":\"exposure\",\"experiment\":\"checkout-copy\",\"variant\":\"{arm}\",\"unit\":\"{arm}-{i}\",\"time\":\"2026-05-02T10:00:00Z\"}}\n"
            ));
        }
    }
    std::fs::write(&events, lines).unwrap();
    let sample = dir.path().join("taps.ndjson");
    std::fs::write(
        &sample,
        "{\"who\":\"u-1\",\"at\":\"2026-05-02T10:00:00Z\",\"what\":\"bought\"}\n",
    )
    .unwrap();
    let compare_input = r#"{"kind":"conversion","prior":{"alpha":1,"beta":1},"variants":[{"name":"control","trials":1000,"successes":112},{"name":"tall-pots","trials":1000,"successes":131}]}"#;
    let config = config.to_str().unwrap();
    let events = events.to_str().unwrap();
    let sample = sample.to_str().unwrap();
    let cases: Vec<(Vec<&str>, Option<&str>)> = vec![
        (vec!["check-config", config], None),
        (vec!["check-config", "--config", config], None),
        (
            vec!["replay", "--config", config, "--format", "json", events],
            None,
        ),
        (vec!["replay", "--config", config, "--json", events], None),
        (vec!["replay", "--config", config, events], None),
        (vec!["compare"], Some(compare_input)),
        (vec!["compare", "--format", "table"], Some(compare_input)),
        (
            vec![
                "plan",
                "--config",
                config,
                "--experiment",
                "checkout-copy",
                "--sims",
                "4",
                "--units-per-day",
                "200",
                "--days",
                "1",
                "--baseline",
                "purchase=0.10",
                "--baseline",
                "payment-error=0.01",
                "--format",
                "json",
            ],
            None,
        ),
        (
            vec![
                "read-sample",
                "--config",
                config,
                "--source",
                "taps",
                sample,
            ],
            None,
        ),
    ];
    for (args, stdin) in cases {
        let (code, stderr) = run_into_closed_pipe(&args, stdin);
        assert_eq!(code, Some(0), "{args:?}: {stderr}");
        assert!(
            !stderr.contains("panicked") && !stderr.contains("Broken pipe"),
            "{args:?} is not quiet: {stderr}"
        );
    }
}

#[test]
fn serve_refuses_an_unknown_kafka_client_property_naming_it_before_starting() {
    // librdkafka's own property table decides what is unknown; the config file names the key.
    let dir = tempfile::tempdir().unwrap();
    let config = dir.path().join("posteriord.toml");
    std::fs::write(
        &config,
        format!(
            "[http]\naddr = \"127.0.0.1:0\"\n[kafka]\nbrokers = \"127.0.0.1:9\"\ntopics = [\"t\"]\n\
             [kafka.properties]\n\"no.such.client.property\" = \"on\"\n{}",
            common::TEST_EXPERIMENTS
        ),
    )
    .unwrap();
    let mut child = Command::new(bin())
        .arg("serve")
        .arg("--config")
        .arg(&config)
        .env("POSTERIORD_STORE_DIR", dir.path().join("state"))
        .stdout(Stdio::null())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    let status = wait_exit(&mut child, Duration::from_secs(30));
    if status.is_none() {
        child.kill().ok();
    }
    let mut stderr = String::new();
    std::io::Read::read_to_string(&mut child.stderr.take().unwrap(), &mut stderr).unwrap();
    let status = status.unwrap_or_else(|| panic!("serve did not end; stderr:\n{stderr}"));
    assert_eq!(status.code(), Some(2), "{stderr}");
    assert!(
        stderr.contains("kafka.properties") && stderr.contains("no.such.client.property"),
        "{stderr}"
    );
}
