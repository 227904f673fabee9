//! Command-line interface: the commands, their options, and what each one runs. Exit codes are
//! chosen by `main` from the error type: [`UsageError`] (bad input or config) → 2, anything
//! else → 1.

use std::io::Read;
use std::net::SocketAddr;
use std::path::PathBuf;
use std::time::Duration;

use anyhow::Context;
use clap::{Parser, Subcommand, ValueEnum};
use tokio_util::sync::CancellationToken;

use crate::app::{self, RunOptions};
use crate::config::{self, Config, HttpConfig, StoreConfig};
use crate::simulate::{self, SimulateOptions};

/// Writes a command's output to standard output and returns the write's error instead of
/// panicking as `print!` does, so a reader that closes the pipe early (`| head`) ends the
/// command quietly: `main` exits 0 on a broken pipe, as command-line filters do.
macro_rules! out {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        let mut o = std::io::stdout().lock();
        write!(o, $($arg)*).and_then(|()| o.flush())
    }};
}

/// [`out!`] with a newline.
macro_rules! outln {
    ($($arg:tt)*) => {{
        use std::io::Write as _;
        let mut o = std::io::stdout().lock();
        writeln!(o, $($arg)*).and_then(|()| o.flush())
    }};
}

/// Whether `e` is standard output's reader having gone away (`EPIPE`), which ends a command
/// quietly with success rather than as a failure.
pub fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

/// Continuous, exact Bayesian monitoring of online experiments.
#[derive(Debug, Parser)]
#[command(name = "posteriord", version, about, long_about = None)]
pub struct Cli {
    /// What to run.
    #[command(subcommand)]
    pub command: Command,
}

/// The commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Serve simulated traffic for invented experiments (no Kafka needed).
    Demo {
        /// Address of the HTTP API; without --addr, `POSTERIORD_HTTP_ADDR` as for `serve`
        /// (the container image sets it to 0.0.0.0:8080).
        #[arg(long, env = "POSTERIORD_HTTP_ADDR", default_value = config::DEFAULT_HTTP_ADDR)]
        addr: SocketAddr,
        /// Stop after this many seconds (default: run until Ctrl-C or SIGTERM).
        #[arg(long)]
        duration: Option<u64>,
        /// New simulated units per second per experiment.
        #[arg(long, default_value_t = 60.0)]
        units_per_second: f64,
        /// Random seed of the simulator.
        #[arg(long, default_value_t = 7)]
        seed: u64,
    },
    /// Run the service with a config file.
    Serve {
        /// The TOML config file.
        #[arg(long)]
        config: PathBuf,
    },
    /// Check a config file; exit 0 when valid, else name the key and line and exit 2.
    CheckConfig {
        /// The TOML config file (as for every other command).
        #[arg(long, required_unless_present = "file", conflicts_with = "file")]
        config: Option<PathBuf>,
        /// The TOML config file, given without `--config`.
        #[arg(value_name = "FILE")]
        file: Option<PathBuf>,
    },
    /// Compare variants from counts given as JSON (a file, or standard input).
    #[command(after_long_help = crate::compare::HELP)]
    Compare {
        /// Input JSON file; standard input when absent.
        file: Option<PathBuf>,
        /// Output: `json` for machines, `text` (a table) for people.
        #[arg(long, value_enum, default_value_t = OutputFormat::Json)]
        format: OutputFormat,
    },
    /// Simulate what an experiment's stopping rules will decide with its traffic, before launch.
    Plan(PlanArgs),
    /// Show how the first lines of a sample file read under a `[[source]]` mapping: each
    /// line's fields, what it reads as, and what applying it in order would do.
    ReadSample {
        /// The TOML config file (its `[[source]]` and experiments).
        #[arg(long)]
        config: PathBuf,
        /// The `[[source]]` whose mapping to use.
        #[arg(long)]
        source: String,
        /// How many lines to read.
        #[arg(long, default_value_t = 20)]
        lines: usize,
        /// The sample file (NDJSON); `-` is standard input.
        file: String,
    },
    /// Feed recorded NDJSON events through the service's pipeline and print every decision.
    Replay {
        /// The TOML config file (experiments and `[alerts]` cadence).
        #[arg(long)]
        config: PathBuf,
        /// NDJSON event files, in order; `-` is standard input. A line may start with its
        /// reference time and a tab (a topic dump's record timestamp in ms, or RFC 3339), which
        /// the event's time is checked against as live (docs/events.md, "Event time").
        #[arg(required = true)]
        events: Vec<String>,
        /// Output: `text` for people, `json` for machines.
        #[arg(long, value_enum, default_value_t = OutputFormat::Text)]
        format: OutputFormat,
        /// The same as `--format json` (kept for scripts written before `--format`).
        #[arg(long, hide = true, conflicts_with = "format")]
        json: bool,
        /// The files are the dumps of one partition of co-partitioned topics, one per topic
        /// (`SOURCE=FILE`), listed in the order of the topics in the config: apply their
        /// lines merged by (reference column, file order, line order), as the live consumer
        /// did, with outcomes waiting for their assignments (docs/events.md).
        #[arg(long)]
        merge_by_reference: bool,
        /// Each argument is one partition of unit-keyed topics (the first partition 0, and so
        /// on): its dump in log order with record timestamps, or its topics' dumps separated
        /// by commas (`SOURCE=FILE,SOURCE=FILE`, merged by reference as live): decide as a
        /// consumer group does, at reference-time boundaries on every partition's totals.
        #[arg(long, conflicts_with = "merge_by_reference")]
        partitioned: bool,
    },
}

/// Options of `plan`.
#[derive(Debug, clap::Args)]
pub struct PlanArgs {
    /// The TOML config file.
    #[arg(long)]
    pub config: PathBuf,
    /// The experiment to plan.
    #[arg(long)]
    pub experiment: String,
    /// Simulated experiments per scenario.
    #[arg(long, default_value_t = 1000)]
    pub sims: usize,
    /// Random seed (same seed, same output bytes).
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Units entering the experiment per day, all variants together.
    #[arg(long)]
    pub units_per_day: f64,
    /// Planned duration in days.
    #[arg(long)]
    pub days: f64,
    /// Baseline rate of a metric, `METRIC=RATE` (conversion probability, or defects per unit);
    /// every metric needs one.
    #[arg(long = "baseline")]
    pub baselines: Vec<String>,
    /// A scenario with a true relative effect, `VARIANT=+X%` (primary metric) or
    /// `VARIANT:METRIC=-X%`; the A/A scenario always runs first.
    #[arg(long = "effect")]
    pub effects: Vec<String>,
    /// Look once, at the end of the planned days (no early stopping).
    #[arg(long)]
    pub single_look: bool,
    /// Simulation step in seconds: traffic is aggregated per step and the configured cadence
    /// is checked at each step's end.
    #[arg(long, default_value_t = 3600)]
    pub step_secs: u64,
    /// Sweep the threshold of caring and recommend the loosest one whose A/A false-ship share
    /// is at most this.
    #[arg(long)]
    pub target_false_ship: Option<f64>,
    /// Sweep the harm probability and recommend the loosest one whose A/A harm-alert share is
    /// at most this.
    #[arg(long)]
    pub target_false_harm: Option<f64>,
    /// Flag scenarios whose share of runs with a false harm alert exceeds this.
    #[arg(long, default_value_t = crate::plan::DEFAULT_MAX_FALSE_HARM)]
    pub max_false_harm: f64,
    /// Flag scenarios whose share of runs shipping the wrong way exceeds this.
    #[arg(long, default_value_t = crate::plan::DEFAULT_MAX_WRONG_SHIP)]
    pub max_wrong_ship: f64,
    /// Output: `text` for people, `json` for machines.
    #[arg(long, value_enum, default_value_t = OutputFormat::Text)]
    pub format: OutputFormat,
    /// The same as `--format json` (kept for scripts written before `--format`).
    #[arg(long, hide = true, conflicts_with = "format")]
    pub json: bool,
    /// Also write an SVG plot of decision shares over time to this file.
    #[arg(long)]
    pub svg: Option<PathBuf>,
    /// Worker threads (default: the available cores); results do not depend on it.
    #[arg(long)]
    pub threads: Option<usize>,
    /// Print throughput and where the time went to standard error.
    #[arg(long)]
    pub bench: bool,
}

/// What a command prints: the one `--format` switch of `compare`, `plan` and `replay`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum OutputFormat {
    /// Text (tables) for people.
    #[value(alias = "table")]
    Text,
    /// JSON for machines.
    Json,
}

/// Bad input or configuration: the message is for the user, the exit code is 2.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct UsageError(pub String);

/// Run the parsed command.
pub fn run(cli: Cli) -> anyhow::Result<()> {
    match cli.command {
        Command::Demo {
            addr,
            duration,
            units_per_second,
            seed,
        } => {
            if !(units_per_second.is_finite() && units_per_second > 0.0) {
                return Err(UsageError(format!(
                    "--units-per-second must be a positive number, got {units_per_second}"
                ))
                .into());
            }
            demo(
                addr,
                duration.map(Duration::from_secs),
                SimulateOptions {
                    units_per_second,
                    seed,
                },
            )
        }
        Command::Serve { config } => serve(&config),
        Command::CheckConfig { config, file } => {
            let path = config.or(file).ok_or_else(|| {
                UsageError("check-config needs a config file: --config FILE".into())
            })?;
            check_config(&path)
        }
        Command::Compare { file, format } => compare(file, format),
        Command::Plan(args) => plan(args),
        Command::Replay {
            config,
            events,
            format,
            json,
            merge_by_reference,
            partitioned,
        } => replay(
            &config,
            &events,
            json || format == OutputFormat::Json,
            merge_by_reference,
            partitioned,
        ),
        Command::ReadSample {
            config,
            source,
            lines,
            file,
        } => read_sample(&config, &source, lines, &file),
    }
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .context("cannot start the async runtime")
}

/// Cancels `token` on SIGTERM or Ctrl-C (SIGINT).
async fn cancel_on_signal(token: CancellationToken) {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        let mut term = match signal(SignalKind::terminate()) {
            Ok(s) => s,
            Err(e) => {
                tracing::error!(error = %e, "cannot watch SIGTERM");
                return;
            }
        };
        tokio::select! {
            _ = term.recv() => tracing::info!("SIGTERM: draining"),
            _ = tokio::signal::ctrl_c() => tracing::info!("interrupt: draining"),
            _ = token.cancelled() => return,
        }
    }
    #[cfg(not(unix))]
    tokio::select! {
        _ = tokio::signal::ctrl_c() => tracing::info!("interrupt: draining"),
        _ = token.cancelled() => return,
    }
    token.cancel();
}

fn demo(addr: SocketAddr, duration: Option<Duration>, sim: SimulateOptions) -> anyhow::Result<()> {
    let config = Config {
        http: HttpConfig {
            // The demo accepts tokens like `serve` does, so it can be shown beyond loopback.
            tokens: config::ApiTokens(
                std::env::var("POSTERIORD_API_TOKENS")
                    .unwrap_or_default()
                    .split(',')
                    .map(str::trim)
                    .filter(|t| !t.is_empty())
                    .map(String::from)
                    .collect(),
            ),
            ..HttpConfig::on(addr)
        },
        kafka: None,
        store: StoreConfig {
            dir: PathBuf::from(config::DEFAULT_STORE_DIR),
            snapshot_interval: Duration::from_millis(config::DEFAULT_SNAPSHOT_INTERVAL_MS),
        },
        experiments: simulate::demo_experiments(),
        alerts: config::AlertsConfig {
            hold_down: Duration::from_secs(60),
            evaluate_every: Duration::from_secs(2),
            ..Default::default()
        },
        shutdown_grace: Duration::from_secs(config::DEFAULT_SHUTDOWN_GRACE_SECS),
        history_arm_points: config::DEFAULT_HISTORY_ARM_POINTS,
        sources: Vec::new(),
        event_time: Default::default(),
    };
    // Refused before anything starts, as `serve` does in load_config.
    crate::http::guard::check_exposure(&config.http, config.http.addr)
        .map_err(|e| UsageError(e.to_string()))?;
    runtime()?.block_on(async move {
        let listener = app::bind(config.http.addr).await?;
        let bound = listener.local_addr()?;
        // The dashboard comes first: it is what a person opening the demo wants.
        let _ = outln!("dashboard: http://{bound}/");
        let _ = outln!("posteriord demo: simulated traffic for the invented bakery Crumb & Co and the gardening app Pocket Orchard");
        let _ = outln!("  experiments: http://{bound}/v1/experiments");
        for e in &config.experiments {
            let _ = outln!("  {:<28} http://{bound}/experiments/{}", e.id, e.id);
        }
        let _ = outln!("  metrics:     http://{bound}/metrics");
        let _ = outln!("  stop with Ctrl-C{}", duration.map_or(String::new(), |d| format!(" (or wait {} s)", d.as_secs())));
        let shutdown = CancellationToken::new();
        tokio::spawn(cancel_on_signal(shutdown.clone()));
        if let Some(d) = duration {
            let token = shutdown.clone();
            tokio::spawn(async move {
                tokio::time::sleep(d).await;
                tracing::info!("demo duration reached");
                token.cancel();
            });
        }
        app::run(config, listener, RunOptions {
                    simulate: Some(sim),
                    persist: false,
                }, shutdown).await
    })
}

fn load_config(path: &std::path::Path) -> anyhow::Result<Config> {
    let config =
        Config::load(path, &config::process_env()).map_err(|e| UsageError(e.to_string()))?;
    // Caught here too, so `check-config` reports it before a deployment does.
    crate::http::guard::check_exposure(&config.http, config.http.addr)
        .map_err(|e| UsageError(format!("{}: {e}", path.display())))?;
    if let Some(kafka) = &config.kafka {
        crate::kafka::client::check_properties(kafka)
            .map_err(|m| UsageError(format!("{}: {m}", path.display())))?;
    }
    Ok(config)
}

fn serve(path: &std::path::Path) -> anyhow::Result<()> {
    let config = load_config(path)?;
    app::prepare_store(&config)?;
    let grace = config.shutdown_grace;
    let rt = runtime()?;
    let result = rt.block_on(async move {
        let listener = app::bind(config.http.addr).await?;
        let bound = listener.local_addr()?;
        let _ = outln!("posteriord listening on http://{bound}");
        tracing::info!(addr = %bound, experiments = config.experiments.len(), kafka = config.kafka.is_some(), "serving");
        let shutdown = CancellationToken::new();
        tokio::spawn(cancel_on_signal(shutdown.clone()));
        let options = RunOptions {
            simulate: None,
            persist: true,
        };
        let run = app::run(config, listener, options, shutdown.clone());
        tokio::pin!(run);
        tokio::select! {
            r = &mut run => r,
            _ = async { shutdown.cancelled().await; tokio::time::sleep(grace).await } => {
                Err(anyhow::anyhow!(
                    "the drain took longer than shutdown.grace_secs = {} s; exiting without waiting further (each partition resumes from its last saved state)",
                    grace.as_secs()
                ))
            }
        }
    });
    // Blocking threads still draining are not waited for past the grace period.
    rt.shutdown_timeout(Duration::from_millis(500));
    result
}

fn check_config(path: &std::path::Path) -> anyhow::Result<()> {
    let config = load_config(path)?;
    outln!(
        "{}: ok ({} experiment{}, {} source mapping{}, Kafka {})",
        path.display(),
        config.experiments.len(),
        if config.experiments.len() == 1 {
            ""
        } else {
            "s"
        },
        config.sources.len(),
        if config.sources.len() == 1 { "" } else { "s" },
        if config.kafka.is_some() {
            "configured"
        } else {
            "not configured"
        }
    )?;
    for def in &config.experiments {
        for w in crate::decide::standing::config_warnings(def) {
            eprintln!("warning: {w}");
        }
    }
    Ok(())
}

fn compare(file: Option<PathBuf>, format: OutputFormat) -> anyhow::Result<()> {
    let input = match &file {
        Some(path) => std::fs::read_to_string(path)
            .map_err(|e| UsageError(format!("cannot read {}: {e}", path.display())))?,
        None => {
            let mut s = String::new();
            std::io::stdin()
                .read_to_string(&mut s)
                .map_err(|e| UsageError(format!("cannot read standard input: {e}")))?;
            s
        }
    };
    let format = match format {
        OutputFormat::Json => crate::compare::Format::Json,
        OutputFormat::Text => crate::compare::Format::Table,
    };
    let output = crate::compare::run(&input, format).map_err(|e| -> anyhow::Error {
        if e.is_input_error() {
            UsageError(e.to_string()).into()
        } else {
            e.into()
        }
    })?;
    out!("{output}")?;
    if !output.ends_with('\n') {
        outln!("")?;
    }
    Ok(())
}

fn progress_bar(len: u64, what: &str) -> indicatif::ProgressBar {
    let bar = indicatif::ProgressBar::with_draw_target(
        Some(len),
        indicatif::ProgressDrawTarget::stderr(),
    );
    let style = indicatif::ProgressStyle::with_template(&format!(
        "{what} {{bar:40}} {{pos}}/{{len}} ({{per_sec}}, eta {{eta}})"
    ))
    .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar());
    bar.set_style(style);
    bar
}

/// `plan`'s progress: a bar on a terminal, otherwise a line every few seconds; and, once the
/// first simulations show the pace, one line saying so when the whole run will take more than
/// a minute. The estimate counts simulations, which `plan::run` hands out interleaved across
/// scenarios so that the pace seen early is the pace of the whole run.
struct PlanProgress {
    bar: indicatif::ProgressBar,
    total: u64,
    done: std::sync::atomic::AtomicU64,
    started: std::time::Instant,
    last_line: std::sync::Mutex<std::time::Instant>,
    warned: std::sync::atomic::AtomicBool,
    terminal: bool,
}

/// Seconds between progress lines when standard error is not a terminal.
const PROGRESS_LINE_SECS: u64 = 5;

impl PlanProgress {
    fn new(total: u64) -> PlanProgress {
        use std::io::IsTerminal;
        let terminal = std::io::stderr().is_terminal();
        let bar = progress_bar(total, "simulating");
        if !terminal {
            bar.set_draw_target(indicatif::ProgressDrawTarget::hidden());
        }
        let now = std::time::Instant::now();
        PlanProgress {
            bar,
            total: total.max(1),
            done: std::sync::atomic::AtomicU64::new(0),
            started: now,
            last_line: std::sync::Mutex::new(now),
            warned: std::sync::atomic::AtomicBool::new(false),
            terminal,
        }
    }

    /// Count `n` simulations that will not run (a sweep that met its target early).
    fn skip(&self, n: u64) {
        self.done.fetch_add(n, std::sync::atomic::Ordering::Relaxed);
        self.bar.inc(n);
    }

    fn finish(&self) {
        self.bar.finish_and_clear();
        if !self.terminal {
            eprintln!(
                "simulating: done, {} simulations in {:.1} s",
                self.total,
                self.started.elapsed().as_secs_f64()
            );
        }
    }

    fn report(&self, done: u64) {
        let elapsed = self.started.elapsed().as_secs_f64();
        let eta = elapsed / done.max(1) as f64 * (self.total.saturating_sub(done)) as f64;
        // Say it once, as soon as the pace is known (2% done or 3 s in).
        if !self.warned.load(std::sync::atomic::Ordering::Relaxed)
            && (done * 50 >= self.total || elapsed >= 3.0)
        {
            self.warned
                .store(true, std::sync::atomic::Ordering::Relaxed);
            if elapsed + eta > 60.0 {
                let msg = format!(
                    "posteriord plan: this run will take about {:.0} min ({} simulations at {:.1}/s); fewer --sims or a longer --step-secs trade precision for time",
                    (elapsed + eta) / 60.0,
                    self.total,
                    done as f64 / elapsed.max(1e-9)
                );
                self.bar.suspend(|| eprintln!("{msg}"));
            }
        }
        if !self.terminal {
            let mut last = self.last_line.lock().unwrap_or_else(|p| p.into_inner());
            if last.elapsed().as_secs() >= PROGRESS_LINE_SECS {
                *last = std::time::Instant::now();
                eprintln!(
                    "simulating: {done}/{} ({:.0}%), {:.0} s elapsed, about {:.0} s left",
                    self.total,
                    100.0 * done as f64 / self.total as f64,
                    elapsed,
                    eta
                );
            }
        }
    }
}

impl crate::plan::Progress for PlanProgress {
    fn advance(&self) {
        let done = self.done.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1;
        self.bar.inc(1);
        self.report(done);
    }
}

fn plan(args: PlanArgs) -> anyhow::Result<()> {
    use crate::plan::{self, PlanOptions, Scenario, SweepKind};
    let bad = |m: String| anyhow::Error::from(UsageError(m));
    let config = load_config(&args.config)?;
    let def = config
        .experiments
        .iter()
        .find(|e| e.id == args.experiment)
        .cloned()
        .ok_or_else(|| {
            bad(format!(
                "{}: no experiment `{}` (configured: {})",
                args.config.display(),
                args.experiment,
                config
                    .experiments
                    .iter()
                    .map(|e| e.id.as_str())
                    .collect::<Vec<_>>()
                    .join(", ")
            ))
        })?;
    if args.sims == 0 {
        return Err(bad("--sims must be at least 1".into()));
    }
    if !(args.units_per_day.is_finite() && args.units_per_day >= 1.0) {
        return Err(bad(format!(
            "--units-per-day must be at least 1, got {}",
            args.units_per_day
        )));
    }
    if !(args.days.is_finite() && args.days > 0.0 && args.days <= 3650.0) {
        return Err(bad(format!(
            "--days must be in (0, 3650], got {}",
            args.days
        )));
    }
    if args.step_secs == 0 {
        return Err(bad("--step-secs must be at least 1".into()));
    }
    for (flag, t) in [
        ("--target-false-ship", args.target_false_ship),
        ("--target-false-harm", args.target_false_harm),
        ("--max-false-harm", Some(args.max_false_harm)),
        ("--max-wrong-ship", Some(args.max_wrong_ship)),
    ] {
        if let Some(t) = t {
            if !(t > 0.0 && t < 1.0) {
                return Err(bad(format!("{flag} must be a share in (0, 1), got {t}")));
            }
        }
    }
    let baselines = plan::parse_baselines(&def, &args.baselines).map_err(|e| bad(e.to_string()))?;
    let mut scenarios = vec![Scenario {
        name: "A/A".into(),
        effects: Vec::new(),
    }];
    for text in &args.effects {
        let effect = plan::parse_effect(&def, text).map_err(|e| bad(e.to_string()))?;
        scenarios.push(Scenario {
            name: text.clone(),
            effects: vec![effect],
        });
    }
    let step = (args.step_secs as i64) * 1_000_000;
    let every = config.alerts.evaluate_every.as_micros() as i64;
    if every < step && !args.single_look {
        eprintln!(
            "posteriord plan: the configured cadence (alerts.evaluate_every_secs = {} s) is finer than the simulation step ({} s); the rules are looked at once per step, which slightly understates the effect of looking often",
            every / 1_000_000,
            args.step_secs
        );
    }
    let threads = args
        .threads
        .unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()));
    let opts = PlanOptions {
        def: std::sync::Arc::new(def),
        cadence: config.alerts.cadence(),
        hold_down: config.alerts.hold_down_micros(),
        sims: args.sims,
        seed: args.seed,
        units_per_day: args.units_per_day,
        days: args.days,
        step,
        single_look: args.single_look,
        baselines,
        scenarios,
        threads,
        max_false_harm: args.max_false_harm,
        max_wrong_ship: args.max_wrong_ship,
    };
    let sweeps: Vec<(SweepKind, f64)> = [
        args.target_false_ship
            .map(|t| (SweepKind::ThresholdOfCaring, t)),
        args.target_false_harm
            .map(|t| (SweepKind::HarmProbability, t)),
    ]
    .into_iter()
    .flatten()
    .collect();
    let mut total = (opts.scenarios.len() * opts.sims) as u64;
    for (kind, _) in &sweeps {
        total += (plan::sweep_values(&opts.def, *kind)
            .map_err(|e| bad(e.to_string()))?
            .len()
            * opts.sims) as u64;
    }
    let bar = PlanProgress::new(total);
    let started = std::time::Instant::now();
    let (results, timing) = plan::run(&opts, &bar);
    let wall = started.elapsed();
    let mut sweep_docs = Vec::new();
    let mut sweep_text = String::new();
    for (kind, target) in &sweeps {
        let points = plan::sweep(&opts, *kind, *target, &bar).map_err(|e| bad(e.to_string()))?;
        // Values after the one meeting the target are not run: count them as done, so the
        // bar and its estimate end where the work ends.
        let tried = plan::sweep_values(&opts.def, *kind)
            .map_err(|e| bad(e.to_string()))?
            .len();
        bar.skip(((tried - points.len()) * opts.sims) as u64);
        let best = plan::recommend(&points, *kind, *target);
        let (what, error) = match kind {
            SweepKind::ThresholdOfCaring => ("ship.threshold_of_caring", "false_ship"),
            SweepKind::HarmProbability => ("harm.probability", "harm"),
        };
        sweep_docs.push(serde_json::json!({
            "parameter": what,
            "target": {"error": error, "share": target},
            "points": points.iter().map(|p| serde_json::json!({
                "value": p.value, "aa_error_share": p.error_share, "mc_standard_error": p.standard_error,
            })).collect::<Vec<_>>(),
            "recommended": best,
        }));
        use std::fmt::Write;
        let _ = writeln!(
            sweep_text,
            "sweep of {what}: A/A {error} share per value (target ≤ {target})"
        );
        // Each value in the unit of what it is compared with: a threshold of caring as a
        // difference of the primary metric's rates, a harm probability as a probability.
        let primary = opts.def.metrics[opts.def.rules.primary].kind;
        let shown = |x: f64| match kind {
            SweepKind::ThresholdOfCaring => format!(
                "{x:.4e} ({})",
                crate::decide::rate_difference_text(x, primary)
            ),
            SweepKind::HarmProbability => format!("{x}"),
        };
        for p in &points {
            let _ = writeln!(
                sweep_text,
                "  {what} = {:<30} {error} {:.4} ± {:.4}{}",
                shown(p.value),
                p.error_share,
                p.standard_error,
                if Some(p.value) == best {
                    "   ← loosest meeting the target"
                } else {
                    ""
                }
            );
        }
        let _ = writeln!(
            sweep_text,
            "  recommended {what}: {}\n",
            best.map_or(
                "none of the values tried meets the target; plan more units or fewer looks"
                    .to_string(),
                shown
            )
        );
    }
    bar.finish();
    if args.bench {
        let eval = timing.evaluating_ns as f64;
        let sim = timing.simulating_ns as f64;
        eprintln!(
            "bench: {} simulations in {:.2} s wall on {} threads = {:.1} sims/s ({:.1} sims/s per thread); {} looks, {:.2} µs per look (thread time); evaluation {:.1}% of thread time, simulation {:.1}%; evaluation/simulation = {:.2}x; metric evaluations decided by the look-to-look bound {} of {}",
            opts.scenarios.len() * opts.sims,
            wall.as_secs_f64(),
            threads,
            (opts.scenarios.len() * opts.sims) as f64 / wall.as_secs_f64(),
            (opts.scenarios.len() * opts.sims) as f64 / ((eval + sim) / 1e9),
            timing.looks,
            (eval + sim) / 1e3 / timing.looks.max(1) as f64,
            100.0 * eval / (eval + sim).max(1.0),
            100.0 * sim / (eval + sim).max(1.0),
            eval / sim.max(1.0),
            timing.metrics_skipped,
            timing.metrics_skipped + timing.metrics_computed,
        );
    }
    if let Some(path) = &args.svg {
        let svg =
            plan::svg(&opts, &results).map_err(|e| anyhow::anyhow!("cannot draw the plot: {e}"))?;
        std::fs::write(path, svg).with_context(|| format!("cannot write {}", path.display()))?;
    }
    let def = &opts.def;
    if args.json || args.format == OutputFormat::Json {
        let doc = serde_json::json!({
            "experiment": def.id,
            "primary_metric": def.metrics[def.rules.primary].name,
            "sims": opts.sims,
            "seed": opts.seed,
            "units_per_day": opts.units_per_day,
            "days": opts.days,
            "step_secs": args.step_secs,
            "single_look": opts.single_look,
            "cadence": {"evaluate_every_secs": every / 1_000_000, "evaluate_every_events": opts.cadence.every_events},
            "baselines": def.metrics.iter().zip(&opts.baselines).map(|(m, b)| serde_json::json!({"metric": m.name, "rate": b})).collect::<Vec<_>>(),
            "scenarios": results.iter().map(|r| plan::scenario_json(&opts, r)).collect::<Vec<_>>(),
            "sweeps": sweep_docs,
            "caution": crate::doc::CAUTION,
        });
        outln!("{}", serde_json::to_string_pretty(&doc)?)?;
    } else {
        outln!(
            "plan for `{}`: {} runs per scenario, {} units/day for {} days, {} (seed {})\n",
            def.id,
            opts.sims,
            opts.units_per_day,
            opts.days,
            if opts.single_look {
                "one look at the end".to_string()
            } else {
                format!(
                    "looks every {} s of event time or {} events (checked every {} s)",
                    every / 1_000_000,
                    opts.cadence.every_events,
                    args.step_secs
                )
            },
            opts.seed
        )?;
        for r in &results {
            outln!("{}", plan::scenario_table(&opts, r))?;
        }
        out!("{sweep_text}")?;
        outln!("{}", crate::doc::CAUTION)?;
    }
    Ok(())
}

fn read_sample(
    config: &std::path::Path,
    source: &str,
    lines: usize,
    file: &str,
) -> anyhow::Result<()> {
    let config = load_config(config)?;
    let Some(source) = config.source(source) else {
        let known: Vec<&str> = config
            .sources
            .iter()
            .map(|s| s.mapping.name.as_str())
            .collect();
        return Err(UsageError(format!(
            "no [[source]] named `{source}` in the config (it has: {})",
            if known.is_empty() {
                "none".to_string()
            } else {
                known.join(", ")
            }
        ))
        .into());
    };
    let input: Box<dyn std::io::BufRead> = if file == "-" {
        Box::new(std::io::BufReader::new(std::io::stdin()))
    } else {
        Box::new(std::io::BufReader::new(
            std::fs::File::open(file)
                .map_err(|e| UsageError(format!("cannot read {file}: {e}")))?,
        ))
    };
    let report = crate::sample::read_sample(&config, &source.mapping, input, lines)
        .map_err(|e| UsageError(format!("cannot read {file}: {e}")))?;
    out!("{}", crate::sample::to_text(&report))?;
    Ok(())
}

fn replay(
    config: &std::path::Path,
    events: &[String],
    json: bool,
    merge_by_reference: bool,
    partitioned: bool,
) -> anyhow::Result<()> {
    let config = load_config(config)?;
    let inputs: Vec<crate::replay::Input> = events
        .iter()
        .map(|e| crate::replay::Input::parse(e))
        .collect();
    let size: u64 = inputs
        .iter()
        .map(|i| match i {
            crate::replay::Input::File(p) => std::fs::metadata(p).map_or(0, |m| m.len()),
            crate::replay::Input::Stdin => 0,
        })
        .sum();
    let bar = progress_bar(size, "replaying");
    bar.set_style(
        indicatif::ProgressStyle::with_template(
            "replaying {bar:40} {bytes}/{total_bytes} ({bytes_per_sec}, eta {eta})",
        )
        .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
    );
    let report = if partitioned {
        crate::replay::replay_partitioned(&config, &inputs, &bar)
    } else {
        crate::replay::replay(&config, &inputs, merge_by_reference, &bar)
    }
    .map_err(|e| UsageError(e.to_string()))?;
    bar.finish_and_clear();
    if json {
        outln!(
            "{}",
            serde_json::to_string_pretty(&crate::replay::to_json(&report))?
        )?;
    } else {
        out!("{}", crate::replay::to_text(&report))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;
    use clap::CommandFactory;

    #[test]
    fn the_command_line_is_well_formed() {
        Cli::command().debug_assert();
    }
}
