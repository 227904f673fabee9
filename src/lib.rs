//! posteriord: continuous, exact Bayesian monitoring of online experiments.
//!
//! # Layout
//! - [`experiment`], [`event`], [`state`], [`stats`]: the pure core (no I/O, no async, no serde).
//! - [`decode`]: the JSON event wire format.
//! - [`config`]: TOML config → validated [`config::Config`].
//! - `app`, `http`, `kafka`, `simulate`, `metrics`: the edges that move events in and state out.
//!
//! Data flows one way: source → decode → state → (decide) → HTTP API / metrics.
#![deny(missing_docs)]

pub mod config;
pub mod decode;
pub mod event;
pub mod experiment;
pub mod state;
