//! Tests of config parsing and validation: every error names its key and line.

use super::*;

const EXAMPLE: &str = include_str!("../../config/example.toml");

fn parse(text: &str) -> Result<Config, ConfigError> {
    Config::parse(text, "test.toml", &[])
}

fn error(text: &str) -> ConfigError {
    parse(text).expect_err("config should be refused")
}

fn line_of(text: &str, needle: &str) -> usize {
    text.lines().position(|l| l.contains(needle)).expect(needle) + 1
}

#[test]
fn the_example_config_is_valid() {
    let c = parse(EXAMPLE).unwrap();
    assert_eq!(c.http.addr.to_string(), "127.0.0.1:8080");
    let k = c.kafka.unwrap();
    assert_eq!(k.topics, vec!["exp-events".to_string()]);
    assert_eq!(k.properties["session.timeout.ms"], "10000");
    let e = &c.experiments[0];
    assert_eq!(e.id, "checkout-copy");
    assert_eq!(e.control, 0);
    assert_eq!(
        e.metrics[1].kind,
        MetricKind::DefectRate(ExposureBasis::Units)
    );
    assert_eq!(
        e.metrics[1].prior,
        Prior::Gamma {
            shape: 1.0,
            rate: 1.0
        }
    );
}

#[test]
fn a_typo_in_a_key_names_the_key_and_line() {
    let text = EXAMPLE.replace("control = \"control\"", "contrl = \"control\"");
    let err = error(&text);
    assert_eq!(err.line, Some(line_of(&text, "contrl =")), "{err}");
    assert!(err.to_string().contains("contrl"), "{err}");
    assert!(err.to_string().starts_with("test.toml:"), "{err}");
}

#[test]
fn bad_values_name_the_key_and_line() {
    let cases = [
        (
            EXAMPLE.replace(
                "weight = 0.5 }, { name = \"short-copy\"",
                "weight = -0.5 }, { name = \"short-copy\"",
            ),
            "experiment[0].variants[0].weight",
            "variants = [",
        ),
        (
            EXAMPLE.replace("control = \"control\"", "control = \"treatment\""),
            "experiment[0].control",
            "control = \"treatment\"",
        ),
        (
            EXAMPLE.replace("kind = \"conversion\" ", "kind = \"conversoin\" "),
            "",
            "kind = \"conversoin\"",
        ),
        (
            EXAMPLE.replace("alpha = 1.0, beta = 1.0", "alpha = 0.0, beta = 1.0"),
            "experiment[0].metric[0].prior.alpha",
            "alpha = 0.0",
        ),
        // Priors outside the range the statistics are verified on (docs/methods.md,
        // "Accepted ranges") are refused by key and line, not at every evaluation.
        (
            EXAMPLE.replace("alpha = 1.0, beta = 1.0", "alpha = 1e-12, beta = 1.0"),
            "experiment[0].metric[0].prior.alpha",
            "alpha = 1e-12",
        ),
        (
            EXAMPLE.replace("shape = 1.0, rate = 1.0", "shape = 1.0, rate = 1e20"),
            "experiment[0].metric[1].prior.rate",
            "rate = 1e20",
        ),
        (
            EXAMPLE.replace("shape = 1.0, rate = 1.0", "alpha = 1.0, beta = 1.0 "),
            "experiment[0].metric[1].prior",
            "beta = 1.0  }",
        ),
        (
            EXAMPLE.replace("addr = \"127.0.0.1:8080\"", "addr = \"localhost\""),
            "http.addr",
            "addr = \"localhost\"",
        ),
        (
            EXAMPLE.replace(
                "weight = 0.5 }, { name = \"short-copy\", weight = 0.5",
                "weight = 0.5 }, { name = \"short-copy\", weight = 0.4",
            ),
            "experiment[0].variants",
            "variants = [",
        ),
        (
            EXAMPLE.replace("name = \"short-copy\"", "name = \"control\""),
            "experiment[0].variants[1].name",
            "variants = [",
        ),
        (
            EXAMPLE.replace("name = \"payment-error\"", "name = \"purchase\""),
            "experiment[0].metric[1].name",
            "name = \"purchase\"\nkind = \"defect",
        ),
        (
            EXAMPLE.replace("topics = [\"exp-events\"]", "topics = []"),
            "kafka.topics",
            "topics = []",
        ),
        (
            EXAMPLE.replace("id = \"checkout-copy\"", "id = \"checkout copy\""),
            "experiment[0].id",
            "id = \"checkout copy\"",
        ),
    ];
    for (text, key, needle) in cases {
        let err = error(&text);
        assert_eq!(err.key, key, "{err}");
        let expected = if needle.contains('\n') {
            // Multi-line needles pick the first line of the match.
            text[..text.find(needle).unwrap()].lines().count() + 1
        } else {
            line_of(&text, needle)
        };
        assert_eq!(err.line, Some(expected), "{err}");
    }
}

#[test]
fn exposure_on_a_conversion_metric_is_refused() {
    let text = EXAMPLE.replace(
        "kind = \"conversion\"           # Beta-Binomial over exposed units",
        "kind = \"conversion\"\nexposure = \"units\"",
    );
    let err = error(&text);
    assert_eq!(err.key, "experiment[0].metric[0].exposure");
}

#[test]
fn weights_default_to_an_equal_split_and_priors_to_uniform() {
    let text = r#"
[[experiment]]
id = "oven-timer"
variants = [ { name = "a" }, { name = "b" }, { name = "c" } ]
[[experiment.metric]]
name = "burnt-loaf"
kind = "defect_rate"
exposure = "reported"
[[experiment.metric]]
name = "sold-out"
kind = "conversion"
variant_priors = { c = { alpha = 2.0, beta = 8.0 } }
"#;
    let c = parse(text).unwrap();
    assert!(c.kafka.is_none());
    let e = &c.experiments[0];
    assert_eq!(e.control, 0);
    assert!(e
        .variants
        .iter()
        .all(|v| (v.weight - 1.0 / 3.0).abs() < 1e-15));
    assert_eq!(
        e.metrics[0].kind,
        MetricKind::DefectRate(ExposureBasis::Reported)
    );
    assert_eq!(
        e.metrics[1].prior_for(0),
        Prior::Beta {
            alpha: 1.0,
            beta: 1.0
        }
    );
    assert_eq!(
        e.metrics[1].prior_for(2),
        Prior::Beta {
            alpha: 2.0,
            beta: 8.0
        }
    );
}

#[test]
fn environment_overrides_apply_and_name_the_variable() {
    let env = |pairs: &[(&str, &str)]| -> Vec<(String, String)> {
        pairs
            .iter()
            .map(|(k, v)| (k.to_string(), v.to_string()))
            .collect()
    };
    let c = Config::parse(
        EXAMPLE,
        "t",
        &env(&[
            ("POSTERIORD_HTTP_ADDR", "0.0.0.0:9999"),
            ("POSTERIORD_KAFKA_BROKERS", "10.1.2.3:9092"),
            ("POSTERIORD_KAFKA_TOPICS", "a, b"),
            ("POSTERIORD_KAFKA_PROP_SASL_PASSWORD", "hunter2"),
            ("POSTERIORD_STORE_DIR", "/var/lib/posteriord"),
        ]),
    )
    .unwrap();
    assert_eq!(c.http.addr.to_string(), "0.0.0.0:9999");
    let k = c.kafka.unwrap();
    assert_eq!(k.brokers, "10.1.2.3:9092");
    assert_eq!(k.topics, vec!["a".to_string(), "b".to_string()]);
    assert_eq!(k.properties["sasl.password"], "hunter2");
    assert_eq!(c.store.dir, PathBuf::from("/var/lib/posteriord"));

    let err =
        Config::parse(EXAMPLE, "t", &env(&[("POSTERIORD_HTTP_ADDR", "nowhere")])).unwrap_err();
    assert_eq!(err.key, "POSTERIORD_HTTP_ADDR");
    let no_kafka = "[http]\naddr = \"127.0.0.1:1\"\n";
    let err =
        Config::parse(no_kafka, "t", &env(&[("POSTERIORD_KAFKA_BROKERS", "x:1")])).unwrap_err();
    assert!(err.message.contains("POSTERIORD_KAFKA_TOPICS"), "{err}");
    let c = Config::parse(
        no_kafka,
        "t",
        &env(&[
            ("POSTERIORD_KAFKA_BROKERS", "x:1"),
            ("POSTERIORD_KAFKA_TOPICS", "t"),
        ]),
    )
    .unwrap();
    assert_eq!(c.kafka.unwrap().topics, vec!["t".to_string()]);
}

#[test]
fn rules_parse_with_defaults_and_name_bad_keys() {
    let text = EXAMPLE.replace(
        "prior = { shape = 1.0, rate = 1.0 }",
        "prior = { shape = 1.0, rate = 1.0 }\n[experiment.metric.rules]\nmin_units = 800\nharm = { probability = 0.995, margin = 0.1 }\nrope = 0.02",
    )
    .replace(
        "prior = { alpha = 1.0, beta = 1.0 }",
        "prior = { alpha = 1.0, beta = 1.0 }\n[experiment.metric.rules]\nship = { threshold_of_caring = 0.0005 }",
    );
    let c = parse(&text).unwrap();
    let e = &c.experiments[0];
    assert_eq!(e.rules.primary, 0);
    assert_eq!(e.rules.guardrails, vec![1]);
    assert_eq!(
        e.metrics[0].rules.ship,
        Some(ShipRule {
            threshold_of_caring: 0.0005
        })
    );
    assert_eq!(
        e.metrics[0].rules.min_units,
        crate::experiment::DEFAULT_MIN_UNITS
    );
    assert_eq!(e.metrics[1].rules.min_units, 800);
    assert_eq!(
        e.metrics[1].rules.harm,
        Some(HarmRule {
            probability: 0.995,
            margin: 0.1
        })
    );
    assert_eq!(e.metrics[1].rules.rope, 0.02);
    assert_eq!(e.metrics[1].rules.ship, None);

    let bad = text.replace("probability = 0.995", "probability = 1.5");
    let err = error(&bad);
    assert_eq!(
        err.key, "experiment[0].metric[1].rules.harm.probability",
        "{err}"
    );
    let bad = text.replace("min_units = 800", "min_unit = 800");
    let err = error(&bad);
    assert!(err.to_string().contains("min_unit"), "{err}");
    assert_eq!(err.line, Some(line_of(&bad, "min_unit =")));
    let bad = text.replace(
        "id = \"checkout-copy\"",
        "id = \"checkout-copy\"\nprimary = \"refund\"",
    );
    assert_eq!(error(&bad).key, "experiment[0].primary");
}

#[test]
fn api_tokens_come_from_the_file_and_the_environment_and_never_show() {
    let dir = tempfile::tempdir().unwrap();
    let file = dir.path().join("tokens");
    std::fs::write(&file, "# Crumb & Co ops\ncrumb-ops-7c1f9e2a4b6d8e0f\n\n").unwrap();
    let text = format!(
        "[http]\ntoken_file = {:?}\nprotect_reads = true\nrequest_timeout_secs = 5\n",
        file.display().to_string()
    );
    let env = [(
        "POSTERIORD_API_TOKENS".to_string(),
        " orchard-ci-3a5b7c9d1e2f4a6b ,".to_string(),
    )];
    let c = Config::parse(&text, "t.toml", &env).unwrap();
    assert_eq!(
        c.http.tokens.0,
        ["crumb-ops-7c1f9e2a4b6d8e0f", "orchard-ci-3a5b7c9d1e2f4a6b"]
    );
    assert!(c.http.protect_reads);
    assert_eq!(c.http.request_timeout, std::time::Duration::from_secs(5));
    assert!(
        !format!("{c:?}").contains("crumb-ops"),
        "Debug shows no token"
    );

    std::fs::write(&file, "rye\n").unwrap();
    let e = Config::parse(&text, "t.toml", &env).unwrap_err();
    assert_eq!((e.key.as_str(), e.line), ("http.token_file", Some(2)));
    assert!(!e.to_string().contains("rye"), "{e}");

    let e = error("[http]\nprotect_reads = true\n");
    assert_eq!((e.key.as_str(), e.line), ("http.protect_reads", Some(2)));
    let e = error("[http]\nrequest_timeout_secs = 0\n");
    assert_eq!(e.key, "http.request_timeout_secs");
    let e = Config::parse(
        "",
        "t.toml",
        &[("POSTERIORD_API_TOKENS".into(), "short".into())],
    )
    .unwrap_err();
    assert_eq!(e.key, "POSTERIORD_API_TOKENS");
}

#[test]
fn the_history_budget_is_checked_with_its_key_and_line() {
    assert_eq!(
        parse(EXAMPLE).unwrap().history_arm_points,
        DEFAULT_HISTORY_ARM_POINTS
    );
    let text = format!("{EXAMPLE}\n[history]\narm_points = 512\n");
    assert_eq!(parse(&text).unwrap().history_arm_points, 512);
    let text = format!("{EXAMPLE}\n[history]\narm_points = 10\n");
    let err = error(&text);
    assert_eq!(err.key, "history.arm_points", "{err}");
    assert_eq!(err.line, Some(line_of(&text, "arm_points =")), "{err}");
}

#[test]
fn source_mappings_are_checked_with_key_and_line() {
    let base = "[[source]]\nname = \"tickets\"\nunit = \"rider_id\"\ntime = \"ts\"\nevent = \"kind\"\nmetrics = { \"ticket.bought\" = \"purchase\" }\n";
    let c = parse(base).unwrap();
    assert_eq!(c.sources.len(), 1);
    assert_eq!(
        c.source("tickets")
            .unwrap()
            .mapping
            .metric_of("ticket.bought"),
        Some("purchase")
    );
    let cases: [(&str, &str, &str); 6] = [
        (
            "time_format = \"epoch_hours\"\n",
            "source[0].time_format",
            "time_format",
        ),
        ("count = \"rider_id\"\n", "source[0].count", "count ="),
        (
            "constants = { count = \"1\" }\n",
            "source[0].constants.count",
            "constants",
        ),
        ("variant = \"a..b\"\n", "source[0].variant", "variant ="),
        (
            "exposures = [\"ticket.bought\"]\n",
            "source[0].experiment",
            "[[source]]",
        ),
        (
            "constants = { event = \"x\" }\n",
            "source[0].event",
            "event =",
        ),
    ];
    for (extra, key, line_with) in cases {
        let text = format!("{base}{extra}");
        let e = error(&text);
        assert_eq!(e.key, key, "{extra}: {e}");
        assert_eq!(e.line, Some(line_of(&text, line_with)), "{extra}: {e}");
    }
    let no_unit = base.replace("unit = \"rider_id\"\n", "");
    assert_eq!(error(&no_unit).key, "source[0].unit");
    let twice = format!("{base}{base}");
    assert_eq!(error(&twice).key, "source[1].name");
    let window = "[[experiment]]\nid = \"x\"\nvariants = [ { name = \"a\" }, { name = \"b\" } ]\nattribution_window_hours = -2\n[[experiment.metric]]\nname = \"m\"\nkind = \"conversion\"\n";
    let e = error(window);
    assert_eq!(e.key, "experiment[0].attribution_window_hours");
    assert_eq!(e.line, Some(4));
}

#[test]
fn webhook_secrets_in_the_standard_webhooks_form_are_decoded_and_bad_ones_named() {
    let text = format!(
        "{EXAMPLE}\n[[alerts.webhook]]\nurl = \"http://127.0.0.1:9/hook\"\nsecret_env = \"ORCHARD_HOOK\"\n"
    );
    // `whsec_` + base64("orchard"): the key is the decoded bytes; other values are raw bytes.
    let env = |v: &str| vec![("ORCHARD_HOOK".to_string(), v.to_string())];
    let c = Config::parse(&text, "test.toml", &env("whsec_b3JjaGFyZA==")).unwrap();
    assert_eq!(c.alerts.webhooks[0].secret, b"orchard");
    let c = Config::parse(&text, "test.toml", &env("whsec_b3JjaGFyZA")).unwrap();
    assert_eq!(
        c.alerts.webhooks[0].secret, b"orchard",
        "padding is optional"
    );
    let c = Config::parse(&text, "test.toml", &env("orchard")).unwrap();
    assert_eq!(c.alerts.webhooks[0].secret, b"orchard");
    let err = Config::parse(&text, "test.toml", &env("whsec_not base64!")).unwrap_err();
    assert_eq!(
        err.line,
        Some(line_of(&text, "secret_env = \"ORCHARD_HOOK\"")),
        "{err}"
    );
    assert!(
        err.to_string().contains("alerts.webhook[0].secret_env"),
        "{err}"
    );
    assert!(err.to_string().contains("not base64"), "{err}");
}

#[test]
fn event_time_bounds_resolve_per_source_and_bad_values_name_key_and_line() {
    use crate::state::skew::{OnSkew, TimeBounds};
    let c = parse(EXAMPLE).unwrap();
    assert_eq!(c.event_time.http, TimeBounds::default());
    assert_eq!(c.event_time.kafka, TimeBounds::default());
    let text = format!(
        "{EXAMPLE}\n[event_time]\nmax_ahead_secs = 60\nmax_behind_days = 2\n[event_time.kafka]\non_skew = \"clamp\"\nmax_behind_days = 0.5\n"
    );
    let c = parse(&text).unwrap();
    let s = 1_000_000i64;
    assert_eq!(
        c.event_time.http,
        TimeBounds {
            max_ahead: 60 * s,
            max_behind: 2 * 86_400 * s,
            on_skew: OnSkew::Refuse
        }
    );
    assert_eq!(
        c.event_time.kafka,
        TimeBounds {
            max_ahead: 60 * s,
            max_behind: 43_200 * s,
            on_skew: OnSkew::Clamp
        }
    );
    for (tail, key, needle) in [
        (
            "[event_time]\nmax_ahead_secs = 0\n",
            "event_time.max_ahead_secs",
            "max_ahead_secs = 0",
        ),
        (
            "[event_time]\nmax_behind_days = -1.0\n",
            "event_time.max_behind_days",
            "max_behind_days = -1",
        ),
        (
            "[event_time.http]\non_skew = \"ignore\"\n",
            "event_time.http.on_skew",
            "on_skew = \"ignore",
        ),
        (
            "[event_time]\nmax_lateness = 3\n",
            "max_lateness",
            "max_lateness =",
        ),
    ] {
        let text = format!("{EXAMPLE}\n{tail}");
        let err = error(&text);
        // The needle's last occurrence: the example may mention the key in a comment.
        let line = text[..text.rfind(needle).unwrap()].matches('\n').count() + 1;
        assert_eq!(err.line, Some(line), "{err}");
        assert!(err.to_string().contains(key), "{err}");
    }
    // A configured start: parsed, and a bad one names its key and line.
    let text = EXAMPLE.replace(
        "control = \"control\"",
        "control = \"control\"\nstart = \"2026-03-02T00:00:00Z\"",
    );
    let c = parse(&text).unwrap();
    // 2026-03-02T00:00:00Z = 1772409600 s (Python `datetime(2026,3,2,tzinfo=timezone.utc).timestamp()`).
    assert_eq!(c.experiments[0].rules.start, Some(1_772_409_600 * s));
    let text = EXAMPLE.replace(
        "control = \"control\"",
        "control = \"control\"\nstart = \"March 2nd\"",
    );
    let err = error(&text);
    assert_eq!(err.line, Some(line_of(&text, "start =")), "{err}");
    assert!(err.to_string().contains("experiment[0].start"), "{err}");
    // The environment override reaches every source.
    let c = Config::parse(
        EXAMPLE,
        "test.toml",
        &[("POSTERIORD_EVENT_TIME_MAX_BEHIND_DAYS".into(), "30".into())],
    )
    .unwrap();
    assert_eq!(c.event_time.http.max_behind, 30 * 86_400 * s);
    assert_eq!(c.event_time.kafka.max_behind, 30 * 86_400 * s);
}

#[test]
fn unit_slips_are_refused_with_the_likely_intended_value() {
    let rules = |line: &str| {
        EXAMPLE.replace(
            "prior = { alpha = 1.0, beta = 1.0 }",
            &format!("prior = {{ alpha = 1.0, beta = 1.0 }}\n[experiment.metric.rules]\n{line}"),
        )
    };
    for (line, key, hint) in [
        (
            "ship = { threshold_of_caring = 5 }",
            "ship.threshold_of_caring",
            "did you mean 0.05 (5 percentage points)?",
        ),
        ("rope = 1.0", "rope", "did you mean 0.01 (1% relative)?"),
        (
            "harm = { probability = 0.999, margin = 2 }",
            "harm.margin",
            "did you mean 0.02 (2% relative)?",
        ),
        (
            "harm_evidence = { margin = 5 }",
            "harm_evidence.margin",
            "did you mean 0.05 (5% relative)?",
        ),
    ] {
        let text = rules(line);
        let err = error(&text);
        assert!(err.to_string().contains(key), "{line}: {err}");
        assert!(err.to_string().contains(hint), "{line}: {err}");
        assert_eq!(err.line, Some(line_of(&text, line)), "{line}: {err}");
    }
    // A defect rate's threshold of caring has no upper bound: 5 defects per unit is a rate.
    let text = EXAMPLE.replace(
        "prior = { shape = 1.0, rate = 1.0 }",
        "prior = { shape = 1.0, rate = 1.0 }\n[experiment.metric.rules]\nship = { threshold_of_caring = 5 }",
    );
    assert!(parse(&text).is_ok());
}

#[test]
fn the_idle_allowance_defaults_to_thirty_seconds_and_bad_values_name_key_and_line() {
    let k = parse(EXAMPLE).unwrap().kafka.unwrap();
    assert_eq!(k.idle_allowance, std::time::Duration::from_secs(30));
    let text = EXAMPLE.replace(
        "group = \"posteriord\"",
        "group = \"posteriord\"\nidle_allowance_secs = 2",
    );
    let k = parse(&text).unwrap().kafka.unwrap();
    assert_eq!(k.idle_allowance, std::time::Duration::from_secs(2));
    for bad in ["-1", "86401", "\"30s\""] {
        let text = EXAMPLE.replace(
            "group = \"posteriord\"",
            &format!("group = \"posteriord\"\nidle_allowance_secs = {bad}"),
        );
        let err = error(&text);
        assert_eq!(
            err.line,
            Some(line_of(&text, "idle_allowance_secs")),
            "{err}"
        );
        if !bad.starts_with('"') {
            // (A value of the wrong type is refused by the TOML reader, by line.)
            assert_eq!(err.key, "kafka.idle_allowance_secs", "{err}");
        }
    }
}
