//! Fuzz target: the event decoder and state update must never panic, and every input ends in
//! exactly one outcome or one reject with a message.
#![no_main]

use std::sync::{Mutex, OnceLock};

use libfuzzer_sys::fuzz_target;
use posteriord::service::ingest::{apply_batch, Item};
use posteriord::service::metrics::{Metrics, Source};
use posteriord::state::shards::Shards;

fn fixture() -> &'static (Mutex<Shards>, Metrics) {
    static FIXTURE: OnceLock<(Mutex<Shards>, Metrics)> = OnceLock::new();
    FIXTURE.get_or_init(|| {
        let text = include_str!("../../config/example.toml");
        let config = posteriord::config::Config::parse(text, "example.toml", &[]).expect("example config is valid");
        (Mutex::new(Shards::new(config.experiments)), Metrics::new())
    })
}

fuzz_target!(|data: &[u8]| {
    let (shards, metrics) = fixture();
    let items = [Item {
        shard: "fuzz",
        offset: None,
        bytes: data,
        mapping: None,
        topic: None,
        reference: None,
    }];
    let report = apply_batch(shards, metrics, Source::Http, &items, 4096);
    assert_eq!(report.results.len(), 1);
    if let Some(Err(reject)) = &report.results[0] {
        assert!(!reject.message.is_empty());
    }
});
