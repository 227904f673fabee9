//! posteriord: continuous, exact Bayesian monitoring of online experiments.
//!
//! The modules stand in layers, each importing only the layers below it; the table and its
//! rules are in docs/architecture.md, and `tests/tidy.rs` holds the code to them.
#![deny(missing_docs)]

pub mod app;
pub mod cli;
pub mod compare;
pub mod config;
pub mod decide;
pub mod decode;
pub mod doc;
pub mod event;
pub mod experiment;
pub mod history;
pub mod http;
pub mod kafka;
pub mod mapping;
pub mod plan;
pub mod replay;
pub mod sample;
pub mod service;
pub mod simulate;
pub mod sinks;
pub mod state;
pub mod stats;
pub mod summary;
