//! The container image built from deploy/container/Containerfile and run with podman: `serve`
//! as the unprivileged user with a mounted config and a fresh volume, probes and token checks
//! through a published port, a graceful `podman stop`, and a new container restoring the
//! state exactly; `demo` in the image too.
//!
//! No registry is reachable, so the two base images are made offline from Debian's mirror
//! (tests/tools/container_bases.py: debootstrap, and a distroless cc-debian12 stand-in cut
//! from it) and passed as build arguments; the build stage takes the binary `cargo test` built
//! (BINARY=prebuilt) — or, with POSTERIORD_CONTAINER_RELEASE=1 or in the soak run, a release
//! binary compiled on the host from exactly the files the Containerfile's compile stage copies,
//! with the same cargo command. Everything after the build stage is the shipped recipe.
//!
//! Engine quirks of these machines (checked with Debian 12's podman 4.3): `--runtime runc`
//! (crun: "cgroups in hybrid mode not supported"), `--isolation chroot` for builds, and
//! explicit `--ulimit nofile=N:N --ulimit nproc=N:N` no higher than the current hard limits
//! (containers may not raise them).

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};
use std::time::{Duration, Instant};

use common::{observed_in, wait_for, workload, SPECS, TEST_EXPERIMENTS};
use serde_json::Value;

const IMAGE: &str = "localhost/posteriord-test/posteriord:tests";
const TOKEN: &str = "container-test-token-7f3a9c21";

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn text(out: &Output) -> String {
    format!(
        "status {:?}\n--- stdout ---\n{}\n--- stderr ---\n{}",
        out.status.code(),
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    )
}

/// Whether the test can run here. Without podman it fails as root or on CI (tests/run.sh
/// installs it), and skips only for a non-root developer, who cannot run debootstrap or
/// rootful podman at all.
fn engine_available() -> bool {
    // SAFETY: geteuid has no preconditions and cannot fail.
    let is_root = unsafe { libc::geteuid() } == 0;
    let has_podman = Command::new("podman").arg("--version").output().is_ok();
    let ci = std::env::var_os("CI").is_some();
    if is_root && has_podman {
        return true;
    }
    assert!(
        !ci && !is_root,
        "tests/container.rs needs root and podman, runc, debootstrap (tests/run.sh installs them)"
    );
    println!(
        "SKIP: the container image test needs root (debootstrap, rootful podman); run \
         tests/run.sh as root, as CI does"
    );
    false
}

/// The limit `resource` may be set to inside a container: at most the current hard limit.
fn ulimit(resource: libc::__rlimit_resource_t, cap: u64) -> u64 {
    let mut lim = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: getrlimit writes into the struct we pass and nothing else.
    let rc = unsafe { libc::getrlimit(resource, &mut lim) };
    assert_eq!(rc, 0, "getrlimit");
    lim.rlim_max.min(cap)
}

fn ulimit_args() -> Vec<String> {
    let nofile = ulimit(libc::RLIMIT_NOFILE, 65_536);
    let nproc = ulimit(libc::RLIMIT_NPROC, 4_096);
    vec![
        "--ulimit".into(),
        format!("nofile={nofile}:{nofile}"),
        "--ulimit".into(),
        format!("nproc={nproc}:{nproc}"),
    ]
}

/// Run podman (with the runc runtime); the output whatever the exit status.
fn podman(args: &[&str]) -> Output {
    Command::new("podman")
        .args(["--runtime", "runc"])
        .args(args)
        .output()
        .expect("run podman")
}

/// Run podman and require success; returns trimmed stdout.
fn podman_ok(args: &[&str]) -> String {
    let out = podman(args);
    assert!(out.status.success(), "podman {args:?}:\n{}", text(&out));
    String::from_utf8_lossy(&out.stdout).trim().to_string()
}

/// Containers and volumes this test made, removed however it ends.
#[derive(Default)]
struct Cleanup {
    containers: Vec<String>,
    volumes: Vec<String>,
}

impl Drop for Cleanup {
    fn drop(&mut self) {
        for c in &self.containers {
            let _ = podman(&["rm", "-f", "-v", c]);
        }
        for v in &self.volumes {
            let _ = podman(&["volume", "rm", "-f", v]);
        }
    }
}

/// `(BUILD_IMAGE, RUNTIME_IMAGE)`: the offline bases, made or taken from the cache.
fn base_images() -> (String, String) {
    let started = Instant::now();
    let out = Command::new("python3")
        .arg(root().join("tests/tools/container_bases.py"))
        .output()
        .expect("python3 is required");
    assert!(out.status.success(), "container_bases.py:\n{}", text(&out));
    let stdout = String::from_utf8_lossy(&out.stdout);
    let get = |key: &str| {
        stdout
            .lines()
            .find_map(|l| l.strip_prefix(&format!("{key}=")))
            .unwrap_or_else(|| panic!("no {key} in {stdout}"))
            .to_string()
    };
    println!("base images ready in {:.1?}", started.elapsed());
    (get("BUILD_IMAGE"), get("RUNTIME_IMAGE"))
}

/// The sources the Containerfile's compile stage copies (`COPY SRC... DEST` lines of the
/// stage named `compile`).
fn compile_stage_sources(containerfile: &str) -> Vec<String> {
    let mut in_stage = false;
    let mut sources = Vec::new();
    for line in containerfile.lines().map(str::trim) {
        if line.starts_with("FROM ") {
            in_stage = line.ends_with(" AS compile");
        } else if in_stage && line.starts_with("COPY ") {
            let words: Vec<&str> = line.split_whitespace().skip(1).collect();
            assert!(
                !words.iter().any(|w| w.starts_with("--")),
                "unexpected COPY option in the compile stage: {line}"
            );
            sources.extend(words[..words.len() - 1].iter().map(|s| s.to_string()));
        }
    }
    assert!(sources.len() >= 3, "compile stage sources: {sources:?}");
    sources
}

/// Lay out a build context holding exactly what the compile stage copies, build the release
/// binary from it with the compile stage's command, and put the binary where the prebuilt
/// stage takes it. The context and cargo's target directory stay under target/, so a warm
/// run recompiles nothing.
fn build_context() -> PathBuf {
    let containerfile = std::fs::read_to_string(root().join("deploy/container/Containerfile"))
        .expect("read the Containerfile");
    let ctx = root().join("target/container-context");
    std::fs::create_dir_all(&ctx).unwrap();
    for src in compile_stage_sources(&containerfile) {
        let dest = ctx.join(&src);
        if dest.is_dir() {
            std::fs::remove_dir_all(&dest).unwrap();
        } else if dest.exists() {
            std::fs::remove_file(&dest).unwrap();
        }
        // -a keeps modification times, so cargo sees unchanged sources as unchanged.
        let ok = Command::new("cp")
            .arg("-a")
            .arg(root().join(&src))
            .arg(&dest)
            .status()
            .expect("run cp")
            .success();
        assert!(ok, "cp -a {src}");
    }
    let bin_dir = ctx.join("target/release");
    std::fs::create_dir_all(&bin_dir).unwrap();
    // The default run puts the binary `cargo test` built into the image: a cold release
    // build costs 10-15 minutes of two cores, on every fresh CI machine, and the stages that
    // ship (everything after the build stage) are the same for either. The soak run, or
    // POSTERIORD_CONTAINER_RELEASE=1, builds the release binary from the compile stage's
    // files with its own command, as the production build does.
    // POSTERIORD_CONTAINER_TEST_BINARY names any other binary, for iterating on this test.
    let release = std::env::var_os("POSTERIORD_CONTAINER_RELEASE").is_some()
        || std::env::var("POSTERIORD_SOAK").is_ok_and(|v| v == "1");
    let chosen = std::env::var_os("POSTERIORD_CONTAINER_TEST_BINARY")
        .or_else(|| (!release).then(|| env!("CARGO_BIN_EXE_posteriord").into()));
    if let Some(bin) = chosen {
        println!(
            "the image carries {bin:?} (set POSTERIORD_CONTAINER_RELEASE=1 for the release build)"
        );
        std::fs::copy(bin, bin_dir.join("posteriord")).unwrap();
        return ctx;
    }
    let started = Instant::now();
    let cargo = std::env::var("CARGO").unwrap_or_else(|_| "cargo".into());
    let target = root().join("target/container-build");
    let out = Command::new(cargo)
        .args(["build", "--release", "--locked"])
        .current_dir(&ctx)
        .env("CARGO_TARGET_DIR", &target)
        .output()
        .expect("run cargo");
    assert!(
        out.status.success(),
        "cargo build --release --locked on the compile stage's files failed:\n{}",
        text(&out)
    );
    println!(
        "release binary built from the compile stage's files in {:.1?}",
        started.elapsed()
    );
    std::fs::copy(
        target.join("release/posteriord"),
        bin_dir.join("posteriord"),
    )
    .unwrap();
    ctx
}

fn build_image() {
    let (build_image, runtime_image) = base_images();
    let ctx = build_context();
    let started = Instant::now();
    let containerfile = root().join("deploy/container/Containerfile");
    let mut args: Vec<String> = vec![
        "build".into(),
        "--isolation".into(),
        "chroot".into(),
        "--pull=never".into(),
    ];
    args.extend(ulimit_args());
    args.extend([
        "-f".into(),
        containerfile.display().to_string(),
        "--build-arg".into(),
        format!("BUILD_IMAGE={build_image}"),
        "--build-arg".into(),
        format!("RUNTIME_IMAGE={runtime_image}"),
        "--build-arg".into(),
        "BINARY=prebuilt".into(),
        "-t".into(),
        IMAGE.into(),
        ctx.display().to_string(),
    ]);
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    podman_ok(&args);
    println!("podman build: {:.1?}", started.elapsed());
}

/// `podman run -d` with the hardening the README shows; returns the published base URL.
fn run_detached(cleanup: &mut Cleanup, name: &str, extra: &[&str], command: &[&str]) -> String {
    let _ = podman(&["rm", "-f", "-v", name]);
    cleanup.containers.push(name.to_string());
    let mut args: Vec<String> = vec!["run".into(), "-d".into(), "--name".into(), name.into()];
    args.extend(ulimit_args());
    args.extend(
        [
            "-p",
            "127.0.0.1::8080",
            "--read-only",
            "--cap-drop",
            "ALL",
            "--security-opt",
            "no-new-privileges",
            "--stop-timeout",
            "30",
        ]
        .map(String::from),
    );
    args.extend(extra.iter().map(|s| s.to_string()));
    args.push(IMAGE.into());
    args.extend(command.iter().map(|s| s.to_string()));
    let args: Vec<&str> = args.iter().map(String::as_str).collect();
    podman_ok(&args);
    let port = podman_ok(&["port", name, "8080/tcp"]);
    let base = format!("http://{}", port.lines().next().unwrap());
    let http = common::client();
    wait_for(Duration::from_secs(30), "the container's /healthz", || {
        let running = podman_ok(&["inspect", name, "--format", "{{.State.Running}}"]);
        assert_eq!(
            running,
            "true",
            "container {name} stopped:\n{}",
            podman_ok(&["logs", name])
        );
        let r = http.get(format!("{base}/healthz")).send().ok()?;
        (r.status().as_u16() == 200).then_some(())
    });
    base
}

/// `podman stop` (SIGTERM, then SIGKILL after 30 s); returns the exit code and how long it took.
fn stop(name: &str) -> (i64, Duration) {
    let started = Instant::now();
    podman_ok(&["stop", "-t", "30", name]);
    let took = started.elapsed();
    let code = podman_ok(&["inspect", name, "--format", "{{.State.ExitCode}}"]);
    (code.parse().unwrap(), took)
}

fn get_json(base: &str, path: &str) -> (u16, Value) {
    let r = common::client()
        .get(format!("{base}{path}"))
        .send()
        .expect("GET");
    (r.status().as_u16(), r.json().unwrap_or(Value::Null))
}

fn post_events(base: &str, body: String, token: Option<&str>) -> (u16, Value) {
    let mut req = common::client()
        .post(format!("{base}/v1/events"))
        .body(body);
    if let Some(t) = token {
        req = req.bearer_auth(t);
    }
    let r = req.send().expect("POST");
    (r.status().as_u16(), r.json().unwrap_or(Value::Null))
}

/// The documents of the test experiments, for an exact before/after comparison.
fn state_docs(base: &str) -> Vec<Value> {
    SPECS
        .iter()
        .map(|s| {
            let (status, doc) = get_json(base, &format!("/v1/experiments/{}", s.id));
            assert_eq!(status, 200, "{doc}");
            doc
        })
        .collect()
}

#[test]
fn the_image_builds_serves_drains_and_restores_its_state() {
    if !engine_available() {
        return;
    }
    let started = Instant::now();
    build_image();
    let mut cleanup = Cleanup::default();

    // What the image says about itself: checked on the built image, not the recipe's text.
    let inspect: Value = serde_json::from_str(&podman_ok(&["image", "inspect", IMAGE])).unwrap();
    let config = &inspect[0]["Config"];
    assert_eq!(config["User"], "65532:65532", "{config:#}");
    assert_eq!(
        config["Entrypoint"],
        serde_json::json!(["/usr/local/bin/posteriord"])
    );
    assert_eq!(
        config["Cmd"],
        serde_json::json!(["serve", "--config", "/etc/posteriord/posteriord.toml"])
    );
    assert_eq!(config["StopSignal"], "SIGTERM", "{config:#}");
    assert!(config["ExposedPorts"]["8080/tcp"].is_object(), "{config:#}");
    for v in ["/etc/posteriord", "/var/lib/posteriord"] {
        assert!(config["Volumes"][v].is_object(), "VOLUME {v}: {config:#}");
    }
    let env: Vec<&str> = config["Env"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e.as_str().unwrap())
        .collect();
    assert!(
        env.contains(&"POSTERIORD_HTTP_ADDR=0.0.0.0:8080"),
        "{env:?}"
    );

    // A fresh volume and a config mounted read-only, as docs/operations.md shows.
    let volume = format!("posteriord-test-state-{}", std::process::id());
    cleanup.volumes.push(volume.clone());
    podman_ok(&["volume", "create", &volume]);
    let dir = tempfile::tempdir().unwrap();
    let config_file = dir.path().join("posteriord.toml");
    std::fs::write(
        &config_file,
        format!("[store]\ndir = \"/var/lib/posteriord\"\n{TEST_EXPERIMENTS}"),
    )
    .unwrap();
    let config_mount = format!(
        "{}:/etc/posteriord/posteriord.toml:ro",
        config_file.display()
    );
    let volume_mount = format!("{volume}:/var/lib/posteriord");
    let token_env = format!("POSTERIORD_API_TOKENS={TOKEN}");
    let mounts = [
        "-e",
        token_env.as_str(),
        // The shared workload's event times are fixed in May 2026; the default event-time
        // bounds (7 days behind the receive time) would refuse them.
        "-e",
        "POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS=3650",
        "-v",
        config_mount.as_str(),
        "-v",
        volume_mount.as_str(),
    ];

    let first = format!("posteriord-test-first-{}", std::process::id());
    let base = run_detached(&mut cleanup, &first, &mounts, &[]);
    println!("serving at {base}");
    // The process runs as 65532 with no capabilities (rootful podman: host ids are the
    // container's ids).
    let pid = podman_ok(&["inspect", &first, "--format", "{{.State.Pid}}"]);
    let status = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let field = |name: &str| {
        status
            .lines()
            .find_map(|l| l.strip_prefix(name))
            .unwrap_or_else(|| panic!("no {name} in /proc/{pid}/status"))
            .split_whitespace()
            .map(String::from)
            .collect::<Vec<_>>()
    };
    assert_eq!(field("Uid:"), ["65532"; 4], "{status}");
    assert_eq!(field("Gid:"), ["65532"; 4], "{status}");
    assert_eq!(field("CapEff:"), ["0000000000000000"], "{status}");
    let (status, body) = get_json(&base, "/readyz");
    assert_eq!(status, 200, "/readyz: {body}");

    // The container listens on 0.0.0.0, not loopback: writes need the token.
    let work = workload(24, 600);
    // The refused writes carry a few events only: the server answers 401/403 before it reads
    // a body, and a client still writing a large one may see the connection close first.
    let few = work.lines[..5].join("\n");
    let (status, body) = post_events(&base, few.clone(), None);
    assert_eq!(status, 401, "a write without a token: {body}");
    let (status, body) = post_events(&base, few, Some("not-the-token-0123456789"));
    assert_eq!(status, 403, "a write with a wrong token: {body}");
    for spec in &SPECS {
        let (_, doc) = get_json(&base, &format!("/v1/experiments/{}", spec.id));
        assert_eq!(
            observed_in(&doc, spec).applied,
            0,
            "a refused write applied: {doc}"
        );
    }
    let (status, body) = post_events(&base, work.lines.join("\n"), Some(TOKEN));
    assert!(status == 200 || status == 422, "{status} {body}");
    assert!(body["applied"].as_u64().unwrap() > 0, "{body}");
    // Totals equal the ground truth computed from the events alone (tests/common), once the
    // readers' summaries (at most a second old, docs/api.md) include the write.
    for (spec, expected) in SPECS.iter().zip(&work.expected) {
        let what = format!("the totals of {} to equal {expected:?}", spec.id);
        wait_for(Duration::from_secs(10), &what, || {
            let (_, doc) = get_json(&base, &format!("/v1/experiments/{}", spec.id));
            (&observed_in(&doc, spec) == expected).then_some(())
        });
    }
    let before = state_docs(&base);

    // podman stop sends the image's STOPSIGNAL; the drain must finish well inside 30 s.
    let (code, took) = stop(&first);
    let logs = podman_ok(&["logs", &first]);
    assert_eq!(code, 0, "exit code after podman stop; logs:\n{logs}");
    assert!(took < Duration::from_secs(25), "drain took {took:?}");
    println!("podman stop: exit 0 after {took:.1?}");

    // The state is on the volume, written by the unprivileged user.
    let mountpoint = podman_ok(&["volume", "inspect", &volume, "--format", "{{.Mountpoint}}"]);
    let saved = Path::new(&mountpoint).join("shards/http.state");
    let meta = std::fs::metadata(&saved)
        .unwrap_or_else(|e| panic!("{} after the drain: {e}", saved.display()));
    use std::os::unix::fs::MetadataExt;
    assert_eq!(meta.uid(), 65532, "{} owner", saved.display());

    // A new container on the same volume restores exactly that state.
    let second = format!("posteriord-test-second-{}", std::process::id());
    let base = run_detached(&mut cleanup, &second, &mounts, &[]);
    wait_for(Duration::from_secs(30), "/readyz after restore", || {
        (get_json(&base, "/readyz").0 == 200).then_some(())
    });
    let after = state_docs(&base);
    for (spec, expected) in SPECS.iter().zip(&work.expected) {
        let (_, doc) = get_json(&base, &format!("/v1/experiments/{}", spec.id));
        assert_eq!(&observed_in(&doc, spec), expected, "restored {}", spec.id);
    }
    assert_eq!(before, after, "the restored documents differ");
    let (code, took) = stop(&second);
    assert_eq!(
        code,
        0,
        "second stop; logs:\n{}",
        podman_ok(&["logs", &second])
    );
    println!("restored exactly; second stop exit 0 after {took:.1?}");

    // The demo runs in the same image: POSTERIORD_HTTP_ADDR (0.0.0.0:8080, set by the
    // image) puts it on all interfaces, so it is reachable through the published port.
    let demo = format!("posteriord-test-demo-{}", std::process::id());
    let base = run_detached(&mut cleanup, &demo, &["-e", token_env.as_str()], &["demo"]);
    let (status, list) = get_json(&base, "/v1/experiments");
    assert_eq!(status, 200, "{list}");
    assert_eq!(list["experiments"].as_array().unwrap().len(), 4, "{list}");
    let (code, _) = stop(&demo);
    assert_eq!(code, 0, "demo stop; logs:\n{}", podman_ok(&["logs", &demo]));
    println!("demo in the image: served 4 experiments, stopped with exit 0");
    println!("whole container test: {:.1?}", started.elapsed());
}
