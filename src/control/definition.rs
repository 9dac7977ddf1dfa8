//! One control record: an experiment's definition as written to the control topic, and the
//! checks it passes before anything acts on it (the configuration file's own, with the same
//! messages, plus what only a record can get wrong).

use serde::{Deserialize, Serialize};

use crate::config::{Config, ExperimentConfig, ResolvedExperiment};
use crate::core::decision::Settle;
use crate::core::{Bounds, Lifecycle, PolicySpec, RewardModel, State};
use crate::event::valid_name;

/// Longest `changed_by` and `note`, in characters.
pub const MAX_BY: usize = 128;
pub const MAX_NOTE: usize = 1000;

/// An experiment's definition, keyed on the control topic by its id. Settings left out take
/// the configuration's `defaults`, as for an experiment declared in the file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Definition {
    pub experiment: String,
    /// Strictly increasing per experiment; `apportion experiment` assigns it (in force + 1).
    #[serde(default)]
    pub revision: u64,
    #[serde(default)]
    pub state: State,
    /// The arms; empty: arms join on first sight.
    #[serde(default)]
    pub arms: Vec<String>,
    #[serde(default)]
    pub accept_new_arms: Option<bool>,
    #[serde(default)]
    pub policy: Option<PolicySpec>,
    #[serde(default)]
    pub reward: Option<RewardModel>,
    #[serde(default)]
    pub bounds: Option<Bounds>,
    #[serde(default)]
    pub half_life_seconds: Option<f64>,
    /// Over `defaults.attribution_window_seconds` when absent or null.
    #[serde(default)]
    pub attribution_window_seconds: Option<f64>,
    /// The arm the others' lift is measured against.
    #[serde(default)]
    pub control_arm: Option<String>,
    /// Over `defaults.settle` when absent or null.
    #[serde(default)]
    pub settle: Option<Settle>,
    /// The arm a concluded experiment sends its traffic to.
    #[serde(default)]
    pub winner: Option<String>,
    #[serde(default)]
    pub changed_by: Option<String>,
    #[serde(default)]
    pub changed_at_ms: Option<i64>,
    #[serde(default)]
    pub note: Option<String>,
}

/// A definition that passed every check, with what the sidecar runs it as.
#[derive(Clone, Debug, PartialEq)]
pub struct Checked {
    pub definition: Definition,
    pub resolved: ResolvedExperiment,
    pub lifecycle: Lifecycle,
}

impl Checked {
    pub fn id(&self) -> &str {
        &self.resolved.id
    }

    pub fn revision(&self) -> u64 {
        self.lifecycle.revision
    }

    /// When the change was made (0 when the record does not say).
    pub fn changed_at_ms(&self) -> i64 {
        self.definition.changed_at_ms.unwrap_or(0)
    }
}

impl Definition {
    /// Reads a record's value (JSON).
    pub fn from_json(bytes: &[u8]) -> Result<Definition, String> {
        serde_json::from_slice(bytes).map_err(|e| format!("not a definition: {e}"))
    }

    /// Reads a definition file: TOML, or JSON when it ends in `.json` or begins with `{`.
    pub fn from_file_text(text: &str, json: bool) -> Result<Definition, String> {
        if json || text.trim_start().starts_with('{') {
            serde_json::from_str(text).map_err(|e| format!("not a definition: {e}"))
        } else {
            toml_definition(text)
        }
    }

    /// The same definition as the configuration file would declare it.
    pub fn as_declared(&self) -> ExperimentConfig {
        ExperimentConfig {
            id: self.experiment.clone(),
            arms: self.arms.clone(),
            policy: self.policy.clone(),
            reward: self.reward,
            bounds: self.bounds.clone(),
            guardrails: None,
            half_life_seconds: self.half_life_seconds,
            attribution_window_seconds: self.attribution_window_seconds,
            accept_new_arms: self.accept_new_arms,
            control_arm: self.control_arm.clone(),
            settle: self.settle.clone(),
        }
    }

    /// A definition for an experiment declared in the configuration file (revision 0), to
    /// change it from.
    pub fn from_declared(e: &ExperimentConfig) -> Definition {
        Definition {
            experiment: e.id.clone(),
            revision: 0,
            state: State::Learning,
            arms: e.arms.clone(),
            accept_new_arms: e.accept_new_arms,
            policy: e.policy.clone(),
            reward: e.reward,
            bounds: e.bounds.clone(),
            half_life_seconds: e.half_life_seconds,
            attribution_window_seconds: e.attribution_window_seconds,
            control_arm: e.control_arm.clone(),
            settle: e.settle.clone(),
            winner: None,
            changed_by: None,
            changed_at_ms: None,
            note: None,
        }
    }

    /// Checks the definition as the configuration `cfg` would check it, and what only a
    /// record can get wrong: its key, its revision, the winner, the lengths of the free text.
    /// `key` is the record's key (`None`: not checked, e.g. a file about to be written).
    pub fn check(self, key: Option<&[u8]>, cfg: &Config) -> Result<Checked, String> {
        let id = &self.experiment;
        if let Some(key) = key {
            if key != id.as_bytes() {
                return Err(format!(
                    "key {:?} differs from experiment = {id:?}; a definition is keyed by its experiment id",
                    String::from_utf8_lossy(key)
                ));
            }
        }
        if self.revision == 0 {
            return Err(format!("definition ({id}).revision = 0; control records count revisions from 1"));
        }
        let resolved = cfg.check_experiment("definition", &self.as_declared())?;
        let named = |what: &str, arm: &str| -> Result<(), String> {
            if !valid_name(arm) {
                return Err(format!("definition ({id}).{what} = {arm:?}; 1–64 characters from [A-Za-z0-9._-]"));
            }
            if !self.arms.is_empty() && !self.arms.iter().any(|a| a == arm) {
                return Err(format!("definition ({id}).{what} = {arm:?} is not one of its arms: {}", self.arms.join(", ")));
            }
            Ok(())
        };
        match (&self.winner, self.state) {
            (Some(w), State::Concluded) => named("winner", w)?,
            (None, State::Concluded) => return Err(format!("definition ({id}): state = \"concluded\" needs a winner, one of its arms")),
            (Some(w), s) => return Err(format!("definition ({id}).winner = {w:?} with state = {s:?}; a winner belongs to a concluded experiment", s = s.as_str())),
            (None, _) => {}
        }
        for (key, v, most) in [("changed_by", &self.changed_by, MAX_BY), ("note", &self.note, MAX_NOTE)] {
            if let Some(v) = v {
                if v.chars().count() > most {
                    return Err(format!("definition ({id}).{key} has {} characters; at most {most}", v.chars().count()));
                }
            }
        }
        let lifecycle = Lifecycle {
            state: self.state,
            revision: self.revision,
            winner: self.winner.clone(),
            state_since_ms: self.changed_at_ms,
            changed_by: self.changed_by.clone(),
            note: self.note.clone(),
        };
        Ok(Checked { definition: self, resolved, lifecycle })
    }
}

/// A TOML definition, read through the same configuration reader as the file, so that its
/// keys and errors read alike.
fn toml_definition(text: &str) -> Result<Definition, String> {
    config::Config::builder()
        .add_source(config::File::from_str(text, config::FileFormat::Toml))
        .build()
        .and_then(|c| c.try_deserialize::<Definition>())
        .map_err(|e| format!("not a definition: {e}"))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn cfg() -> Config {
        Config::from_toml("", "test").expect("the built-in configuration is valid")
    }

    fn record(json: &str) -> Result<Checked, String> {
        Definition::from_json(json.as_bytes())?.check(Some(b"thumb-style"), &cfg())
    }

    const GOOD: &str = r#"{"experiment":"thumb-style","revision":7,"state":"learning","arms":["warm","cool","mono"],
        "accept_new_arms":false,"policy":{"name":"thompson"},"reward":{"kind":"bernoulli"},
        "bounds":{"floor":0.05,"max_step":0.2},"half_life_seconds":null,"attribution_window_seconds":3600,
        "control_arm":"warm","winner":null,"changed_by":"ana","changed_at_ms":1764547200000,"note":"launch"}"#;

    #[test]
    fn the_contract_example_is_a_valid_definition() {
        let c = record(GOOD).expect("valid");
        assert_eq!(c.lifecycle.revision, 7);
        assert_eq!(c.resolved.arms, ["warm", "cool", "mono"]);
        assert!(!c.resolved.spec.accept_new_arms);
        assert_eq!(c.resolved.spec.bounds.floor, 0.05);
        assert_eq!(c.resolved.spec.control_arm.as_deref(), Some("warm"));
        let settled = GOOD.replace("\"winner\":null", "\"winner\":null,\"settle\":{\"min_pulls\":50,\"auto_conclude\":true}");
        let s = record(&settled).expect("valid").resolved.spec.settle;
        assert_eq!((s.min_pulls, s.auto_conclude, s.best_probability), (50, true, 0.95), "keys left out take their defaults");
    }

    #[test]
    fn invalid_records_are_refused_with_the_configuration_s_messages() {
        let cases = [
            (GOOD.replace("\"thompson\"", "\"greedy\""), "policy"),
            (GOOD.replace("0.05", "0.5"), "floor = 0.5 cannot hold"),
            (GOOD.replace("\"learning\"", "\"concluded\""), "needs a winner"),
            (GOOD.replace("\"learning\"", "\"concluded\"").replace("\"winner\":null", "\"winner\":\"gold\""), "winner = \"gold\" is not one of its arms"),
            (GOOD.replace("\"revision\":7", "\"revision\":0"), "revision = 0"),
            (GOOD.replace("\"note\"", "\"remark\""), "unknown field `remark`"),
            (GOOD.replace("\"control_arm\":\"warm\"", "\"control_arm\":\"gold\""), "control_arm (thumb-style) = \"gold\" is not one of its arms"),
            (GOOD.replace("\"winner\":null", "\"winner\":null,\"settle\":{\"best_probability\":0.4}"), "settle.best_probability = 0.4"),
            (GOOD.replace("\"cool\",", "\"warm\","), "declared twice"),
            ("[1,2]".to_string(), "not a definition"),
        ];
        for (json, expected) in cases {
            let e = record(&json).expect_err(&json);
            assert!(e.contains(expected), "{expected:?} not in {e:?}");
        }
        let e = Definition::from_json(GOOD.as_bytes()).expect("parses").check(Some(b"other"), &cfg()).expect_err("wrong key");
        assert!(e.contains("key \"other\" differs from experiment = \"thumb-style\""), "{e}");
    }

    #[test]
    fn a_definition_file_may_be_toml_or_json() {
        let toml = "experiment = \"thumb-style\"\narms = [\"warm\", \"cool\"]\nstate = \"frozen\"\n[bounds]\nfloor = 0.1\n";
        let d = Definition::from_file_text(toml, false).expect("TOML");
        assert_eq!(d.state, State::Frozen);
        assert_eq!(d.bounds.expect("bounds").floor, 0.1);
        let d = Definition::from_file_text(GOOD, false).expect("JSON");
        assert_eq!(d.revision, 7);
    }
}
