//! posteriord: continuous, exact Bayesian monitoring of online experiments.
//!
//! The modules stand in layers, each importing only the layers below it. The one table of them
//! is `src/layers.toml`; `tests/tidy.rs` reads it and fails on an import against it, and
//! docs/architecture.md is the map of what each module does. Modules that nothing outside the
//! crate needs are private.
#![deny(missing_docs)]

mod app;
pub mod cli;
pub mod compare;
pub mod config;
pub mod decide;
pub mod decode;
mod doc;
pub mod event;
pub mod experiment;
pub mod history;
mod http;
mod kafka;
pub mod mapping;
mod plan;
mod replay;
mod sample;
pub mod service;
mod simulate;
mod sinks;
pub mod state;
pub mod stats;
pub mod summary;
