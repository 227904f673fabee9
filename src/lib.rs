//! posteriord: continuous, exact Bayesian monitoring of online experiments.
//!
//! # Layout
//! - [`experiment`], [`event`], [`state`], [`stats`], [`history`]: the pure core (no I/O, no async,
//!   no serde).
//! - [`decode`]: the JSON event wire format.
//! - [`config`]: TOML config → validated [`config::Config`].
//! - `app`, `http`, `kafka`, `simulate`, `metrics`: the edges that move events in and state out.
//!
//! Data flows one way: source → decode → state → (decide) → HTTP API / metrics.
#![deny(missing_docs)]

pub mod alerting;
pub mod app;
pub mod catalog;
pub mod changelog;
pub mod cli;
pub mod compare;
pub mod config;
pub mod decide;
pub mod decode;
pub mod event;
pub mod experiment;
pub mod history;
pub mod http;
pub mod ingest;
pub mod kafka;
pub mod metrics;
pub mod plan;
pub mod replay;
pub mod simulate;
pub mod state;
pub mod stats;
pub mod store;
pub mod summary;
