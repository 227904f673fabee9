//! The JSON form of one `[[experiment]]` table (the body of `PUT /v1/experiments/{id}`),
//! validated by the very code that validates the config file.
//!
//! The JSON is re-emitted as TOML and parsed by the file's parser, so there is one set of
//! experiment rules; while emitting we record which byte range of the TOML text holds which
//! JSON key path, so every error — of shape (from serde) or of meaning (from validation) —
//! names the JSON key it is about. Written by hand because the TOML serializer does not
//! report where it put each value.

use std::ops::Range;

use serde_json::Value;

use super::raw::RawConfig;
use super::{ConfigError, Ctx};
use crate::experiment::ExperimentDef;

/// Where errors about a request body say they come from.
pub const BODY_ORIGIN: &str = "request body";

fn body_err(key: impl Into<String>, message: impl Into<String>) -> ConfigError {
    ConfigError {
        origin: BODY_ORIGIN.into(),
        line: None,
        key: key.into(),
        message: message.into(),
    }
}

/// TOML text with a map from byte ranges back to JSON key paths.
#[derive(Default)]
struct Emitter {
    out: String,
    spans: Vec<(Range<usize>, String)>,
}

fn join(path: &str, key: &str) -> String {
    if path.is_empty() {
        key.to_string()
    } else {
        format!("{path}.{key}")
    }
}

/// A TOML basic string (JSON string escapes are TOML escapes, except that TOML also forbids
/// a raw DEL).
fn quoted(s: &str) -> String {
    serde_json::to_string(s)
        .expect("a string serializes")
        .replace('\u{7f}', "\\u007F")
}

impl Emitter {
    fn value(&mut self, v: &Value, path: &str) -> Result<(), ConfigError> {
        let start = self.out.len();
        match v {
            Value::Null => return Err(body_err(path, "null is not allowed here")),
            Value::Bool(b) => self.out.push_str(if *b { "true" } else { "false" }),
            Value::Number(n) => {
                if n.is_u64() && n.as_i64().is_none() {
                    return Err(body_err(path, format!("{n} is too large")));
                }
                self.out.push_str(&n.to_string());
            }
            Value::String(s) => self.out.push_str(&quoted(s)),
            Value::Array(items) => {
                self.out.push('[');
                for (i, item) in items.iter().enumerate() {
                    if i > 0 {
                        self.out.push_str(", ");
                    }
                    self.value(item, &format!("{path}[{i}]"))?;
                }
                self.out.push(']');
            }
            Value::Object(map) => {
                self.out.push('{');
                let mut first = true;
                // A null member means "not given", as an absent TOML key does.
                for (k, item) in map.iter().filter(|(_, v)| !v.is_null()) {
                    if !first {
                        self.out.push_str(", ");
                    }
                    first = false;
                    let kstart = self.out.len();
                    self.out.push_str(&quoted(k));
                    self.spans.push((kstart..self.out.len(), join(path, k)));
                    self.out.push_str(" = ");
                    self.value(item, &join(path, k))?;
                }
                self.out.push('}');
            }
        }
        self.spans.push((start..self.out.len(), path.to_string()));
        Ok(())
    }

    /// The JSON path of the innermost value or key that contains `offset`.
    fn path_at(&self, offset: usize) -> String {
        self.spans
            .iter()
            .filter(|(r, _)| r.start <= offset && offset < r.end.max(r.start + 1))
            .min_by_key(|(r, _)| r.end - r.start)
            .map(|(_, p)| p.clone())
            .unwrap_or_default()
    }
}

/// The experiment `id` from the JSON form of its `[[experiment]]` table. `id` in the body is
/// optional and must match; every error names its JSON key path (such as
/// `variants[1].weight`).
pub fn experiment_from_json(id: &str, body: &Value) -> Result<ExperimentDef, ConfigError> {
    let Value::Object(map) = body else {
        return Err(body_err(
            "",
            "expected a JSON object: one [[experiment]] table",
        ));
    };
    let mut map = map.clone();
    match map.get("id") {
        None | Some(Value::Null) => {
            map.insert("id".into(), Value::String(id.to_string()));
        }
        Some(Value::String(s)) if s == id => {}
        Some(other) => {
            return Err(body_err(
                "id",
                format!("the body names experiment {other}, the path `{id}`; leave `id` out or make them agree"),
            ))
        }
    }
    let mut e = Emitter::default();
    e.out.push_str("experiment = [");
    e.value(&Value::Object(map), "")?;
    e.out.push_str("]\n");
    let text = e.out.as_str();
    let raw: RawConfig = toml::from_str(text).map_err(|err| {
        let key = err.span().map(|s| e.path_at(s.start)).unwrap_or_default();
        body_err(key, err.message().trim().to_string())
    })?;
    let ctx = Ctx {
        text,
        origin: BODY_ORIGIN,
    };
    let raw_e = raw
        .experiment
        .into_iter()
        .next()
        .ok_or_else(|| body_err("", "expected one experiment"))?;
    ctx.experiment(0, raw_e.into_inner()).map_err(|err| {
        let key = err
            .key
            .strip_prefix("experiment[0]")
            .map(|k| k.trim_start_matches('.').to_string())
            .unwrap_or(err.key);
        body_err(key, err.message)
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    fn body() -> Value {
        json!({
            "control": "control",
            "variants": [{"name": "control", "weight": 0.5}, {"name": "rye-banner", "weight": 0.5}],
            "metric": [
                {"name": "purchase", "kind": "conversion", "prior": {"alpha": 1, "beta": 1}},
                {"name": "payment-error", "kind": "defect_rate", "exposure": "units",
                 "rules": {"harm": {"probability": 0.99}}}
            ],
            "primary": "purchase"
        })
    }

    #[test]
    fn the_json_form_gives_the_same_definition_as_the_file_form() {
        let from_json = experiment_from_json("crumb-rye-banner", &body()).unwrap();
        let toml = r#"
[[experiment]]
id = "crumb-rye-banner"
control = "control"
variants = [ { name = "control", weight = 0.5 }, { name = "rye-banner", weight = 0.5 } ]
primary = "purchase"
[[experiment.metric]]
name = "purchase"
kind = "conversion"
prior = { alpha = 1.0, beta = 1.0 }
[[experiment.metric]]
name = "payment-error"
kind = "defect_rate"
exposure = "units"
rules = { harm = { probability = 0.99 } }
"#;
        let from_file = crate::config::Config::parse(toml, "t.toml", &[]).unwrap();
        assert_eq!(from_json, from_file.experiments[0]);
    }

    #[test]
    fn errors_name_the_json_key_path() {
        let mut b = body();
        b["variants"][1]["weight"] = json!(-1);
        let e = experiment_from_json("x", &b).unwrap_err();
        assert_eq!(e.key, "variants[1].weight");
        assert_eq!(e.line, None);

        let mut b = body();
        b["metric"][0]["kind"] = json!("sparkle");
        let e = experiment_from_json("x", &b).unwrap_err();
        assert_eq!(e.key, "metric[0].kind", "{}", e.message);

        let mut b = body();
        b["metric"][1]["colour"] = json!("red");
        let e = experiment_from_json("x", &b).unwrap_err();
        assert!(e.key.starts_with("metric[1]"), "{}", e.key);
        assert!(e.message.contains("colour"), "{}", e.message);

        let mut b = body();
        b["metric"][0]["prior"] = json!({"shape": 1, "rate": 2});
        let e = experiment_from_json("x", &b).unwrap_err();
        assert_eq!(e.key, "metric[0].prior");

        let e = experiment_from_json("x", &json!({"id": "y", "variants": []})).unwrap_err();
        assert_eq!(e.key, "id");
        assert!(experiment_from_json("x", &json!([1])).is_err());
        let e = experiment_from_json("x", &json!({"variants": [null]})).unwrap_err();
        assert_eq!(e.key, "variants[0]");
    }

    #[test]
    fn strings_with_any_characters_reach_the_validator_intact() {
        let mut b = body();
        b["variants"][0]["name"] = json!("a\"b\\c\u{7f}\n\u{1F33B}");
        let e = experiment_from_json("x", &b).unwrap_err();
        assert_eq!(e.key, "variants[0].name");
        assert!(e.message.contains("may use only"), "{}", e.message);
    }
}
