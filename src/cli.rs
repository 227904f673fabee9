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
        /// Address of the HTTP API.
        #[arg(long, default_value = config::DEFAULT_HTTP_ADDR)]
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
        /// The TOML config file.
        file: PathBuf,
    },
    /// Compare variants from counts given as JSON (a file, or standard input).
    Compare {
        /// Input JSON file; standard input when absent.
        file: Option<PathBuf>,
        /// Output format.
        #[arg(long, value_enum, default_value_t = CompareFormat::Json)]
        format: CompareFormat,
    },
}

/// Output format of `compare`.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum CompareFormat {
    /// JSON for machines.
    Json,
    /// A table for people.
    Table,
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
        Command::CheckConfig { file } => check_config(&file),
        Command::Compare { file, format } => compare(file, format),
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
    };
    runtime()?.block_on(async move {
        let listener = app::bind(config.http.addr).await?;
        let bound = listener.local_addr()?;
        // The dashboard comes first: it is what a person opening the demo wants.
        println!("dashboard: http://{bound}/");
        println!("posteriord demo: simulated traffic for the invented bakery Crumb & Co and the gardening app Pocket Orchard");
        println!("  experiments: http://{bound}/v1/experiments");
        for e in &config.experiments {
            println!("  {:<28} http://{bound}/experiments/{}", e.id, e.id);
        }
        println!("  metrics:     http://{bound}/metrics");
        println!("  stop with Ctrl-C{}", duration.map_or(String::new(), |d| format!(" (or wait {} s)", d.as_secs())));
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
        crate::kafka::check_properties(kafka)
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
        println!("posteriord listening on http://{bound}");
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
    println!(
        "{}: ok ({} experiment{}, Kafka {})",
        path.display(),
        config.experiments.len(),
        if config.experiments.len() == 1 {
            ""
        } else {
            "s"
        },
        if config.kafka.is_some() {
            "configured"
        } else {
            "not configured"
        }
    );
    Ok(())
}

fn compare(file: Option<PathBuf>, format: CompareFormat) -> anyhow::Result<()> {
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
        CompareFormat::Json => crate::compare::Format::Json,
        CompareFormat::Table => crate::compare::Format::Table,
    };
    let output = crate::compare::run(&input, format).map_err(|e| UsageError(e.to_string()))?;
    print!("{output}");
    if !output.ends_with('\n') {
        println!();
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
