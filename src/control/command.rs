//! `apportion experiment …`: reads what is in force (the control topic, the configuration
//! file, the weights topic), writes one new definition, and lists experiments.

use std::collections::BTreeMap;
use std::sync::Mutex;
use std::time::Duration;

use rdkafka::producer::{BaseProducer, BaseRecord, DeliveryResult, Producer, ProducerContext};
use rdkafka::{ClientContext, Message};
use serde::Serialize;

use super::definition::Definition;
use super::reader::TopicReader;
use super::registry::Registry;
use crate::config::{Config, ExperimentConfig};
use crate::core::State;

/// How long reading a topic to its end, or a write, may take.
const LIMIT: Duration = Duration::from_secs(30);

/// Why a command did not do what was asked.
#[derive(Debug, thiserror::Error)]
pub enum CommandError {
    /// The request itself is wrong (a missing experiment or arm, an invalid definition): exit 2.
    #[error("{0}")]
    Refused(String),
    /// The broker could not be read or written: exit 1.
    #[error("{0:#}")]
    Failed(anyhow::Error),
}

impl From<anyhow::Error> for CommandError {
    fn from(e: anyhow::Error) -> Self {
        CommandError::Failed(e)
    }
}

/// A change to one experiment.
#[derive(Clone, Debug)]
pub enum Change {
    /// A whole definition, from a file's text (`json`: read as JSON).
    Define { text: String, json: bool },
    Freeze(String),
    Resume(String),
    Conclude { experiment: String, winner: String },
    Retire(String),
}

/// What the weights topic holds of an experiment: its newest message.
#[derive(Clone, Debug, Default, Serialize)]
pub struct Published {
    pub version: u64,
    pub revision: u64,
    pub state: Option<String>,
    pub leader: Option<String>,
    pub arms: Vec<String>,
    pub published_at_ms: Option<i64>,
}

/// Everything in force, as read from the topics and the configuration.
pub struct Known {
    cfg: Config,
    registry: Registry,
    published: BTreeMap<String, Published>,
}

impl Known {
    /// Reads the control and weights topics to their ends.
    pub fn read(cfg: &Config) -> Result<Known, CommandError> {
        let registry = Registry::new(cfg.clone(), None);
        let mut control = TopicReader::open(cfg, &cfg.kafka.control_topic, "cli")?;
        control.read_to_end(LIMIT, &mut |offset, key, value| {
            registry.offer(offset, key, value);
        })?;
        let mut published = BTreeMap::new();
        let mut weights = TopicReader::open(cfg, &cfg.kafka.weights_topic, "cli")?;
        weights.read_to_end(LIMIT, &mut |_, key, value| {
            let Some(key) = key.map(|k| String::from_utf8_lossy(k).into_owned()) else { return };
            match value.and_then(|v| serde_json::from_slice::<serde_json::Value>(v).ok()) {
                None => {
                    published.remove(&key);
                }
                Some(v) => {
                    let p = Published {
                        version: v["version"].as_u64().unwrap_or(0),
                        revision: v["revision"].as_u64().unwrap_or(0),
                        state: v["state"].as_str().map(String::from),
                        leader: v["leader"].as_str().map(String::from),
                        arms: v["weights"].as_object().map(|w| w.keys().cloned().collect()).unwrap_or_default(),
                        published_at_ms: v["published_at_ms"].as_i64(),
                    };
                    published.insert(key, p);
                }
            }
        })?;
        Ok(Known { cfg: cfg.clone(), registry, published })
    }

    /// The definition in force of `id`, and the highest revision anything has seen of it.
    fn in_force(&self, id: &str) -> Result<(Definition, u64), CommandError> {
        let seen = self.published.get(id).map_or(0, |p| p.revision);
        if let Some(c) = self.registry.get(id) {
            return Ok((c.definition.clone(), c.revision().max(seen)));
        }
        if let Some(e) = self.cfg.experiments.iter().find(|e| e.id == id) {
            return Ok((Definition::from_declared(e), seen));
        }
        if self.published.contains_key(id) {
            let bare = ExperimentConfig { id: id.to_string(), ..ExperimentConfig::default() };
            return Ok((Definition::from_declared(&bare), seen));
        }
        Err(CommandError::Refused(format!(
            "no experiment {id:?}: it is not defined on {}, not declared in the configuration, and has no weights on {}",
            self.cfg.kafka.control_topic, self.cfg.kafka.weights_topic
        )))
    }

    /// The arms of `id`: its definition's, or the last published ones when it names none.
    fn arms(&self, def: &Definition) -> Vec<String> {
        if !def.arms.is_empty() {
            return def.arms.clone();
        }
        self.published.get(&def.experiment).map(|p| p.arms.clone()).unwrap_or_default()
    }

    /// The definition `change` asks for, checked, with its revision (in force + 1), author and
    /// time filled in.
    pub fn prepare(&self, change: &Change, by: &str, note: Option<&str>, now_ms: i64) -> Result<Definition, CommandError> {
        let (mut def, in_force) = match change {
            Change::Define { text, json } => {
                let def = Definition::from_file_text(text, *json).map_err(CommandError::Refused)?;
                let seen = self.published.get(&def.experiment).map_or(0, |p| p.revision);
                let in_force = self.registry.get(&def.experiment).map_or(0, |c| c.revision()).max(seen);
                (def, in_force)
            }
            Change::Freeze(id) | Change::Resume(id) | Change::Retire(id) | Change::Conclude { experiment: id, .. } => self.in_force(id)?,
        };
        match change {
            Change::Define { .. } => {}
            Change::Freeze(_) => (def.state, def.winner) = (State::Frozen, None),
            Change::Resume(_) => (def.state, def.winner) = (State::Learning, None),
            Change::Retire(_) => (def.state, def.winner) = (State::Retired, None),
            Change::Conclude { winner, .. } => {
                let arms = self.arms(&def);
                if !arms.contains(winner) {
                    let listed = if arms.is_empty() { "none yet".to_string() } else { arms.join(", ") };
                    return Err(CommandError::Refused(format!("experiment {:?} has no arm {winner:?}; its arms: {listed}", def.experiment)));
                }
                (def.state, def.winner) = (State::Concluded, Some(winner.clone()));
            }
        }
        def.revision = in_force + 1;
        def.changed_by = Some(by.to_string());
        def.changed_at_ms = Some(now_ms);
        // A definition file may carry its own note; --note replaces it. Other changes carry
        // only the note given with them.
        def.note = match (note, change) {
            (Some(n), _) => Some(n.to_string()),
            (None, Change::Define { .. }) => def.note,
            (None, _) => None,
        };
        let checked = def.check(None, &self.cfg).map_err(CommandError::Refused)?;
        Ok(checked.definition)
    }

    /// One row per experiment known anywhere: defined, declared or published.
    pub fn list(&self) -> Vec<Listed> {
        let mut ids: Vec<String> = self.registry.all().iter().map(|c| c.id().to_string()).collect();
        ids.extend(self.cfg.experiments.iter().map(|e| e.id.clone()));
        ids.extend(self.published.keys().cloned());
        ids.sort();
        ids.dedup();
        ids.into_iter()
            .filter_map(|id| {
                let (def, _) = self.in_force(&id).ok()?;
                let published = self.published.get(&id).cloned();
                let defined = self.registry.get(&id).is_some();
                let state = if defined || published.is_none() {
                    def.state.as_str().to_string()
                } else {
                    published.as_ref().and_then(|p| p.state.clone()).unwrap_or_else(|| "learning".into())
                };
                Some(Listed { experiment: id, state, revision: def.revision, arms: self.arms(&def), published, definition: def })
            })
            .collect()
    }
}

/// Checks a definition file as far as it can be without the broker (everything but the
/// revision), so that a bad file is refused before anything is read or written.
pub fn precheck(text: &str, json: bool, cfg: &Config) -> Result<(), CommandError> {
    let mut def = Definition::from_file_text(text, json).map_err(CommandError::Refused)?;
    def.revision = 1;
    def.check(None, cfg).map(|_| ()).map_err(CommandError::Refused)
}

/// One experiment as `list` shows it.
#[derive(Clone, Debug, Serialize)]
pub struct Listed {
    pub experiment: String,
    pub state: String,
    pub revision: u64,
    pub arms: Vec<String>,
    /// Its newest weights message (none: never published, or retired and removed).
    pub published: Option<Published>,
    /// The definition in force (revision 0: the configuration file's, or the defaults').
    pub definition: Definition,
}

/// Records the outcome of the one delivery a command waits for.
#[derive(Default)]
struct Delivery(Mutex<Option<Result<(), String>>>);

impl ClientContext for Delivery {}

impl ProducerContext for Delivery {
    type DeliveryOpaque = ();
    fn delivery(&self, result: &DeliveryResult<'_>, _: ()) {
        let r = match result {
            Ok(_) => Ok(()),
            Err((e, m)) => Err(format!("{e} (topic {})", m.topic())),
        };
        *self.0.lock().unwrap_or_else(|p| p.into_inner()) = Some(r);
    }
}

/// Writes `def` to the control topic and waits until the broker has it.
pub fn write(cfg: &Config, def: &Definition) -> Result<(), CommandError> {
    let producer: BaseProducer<Delivery> = cfg
        .client_config()
        .set("acks", "all")
        .set("message.timeout.ms", "20000")
        .create_with_context(Delivery::default())
        .map_err(|e| CommandError::Failed(anyhow::anyhow!("cannot create a producer: {e}")))?;
    let bytes = serde_json::to_vec(def).map_err(|e| CommandError::Failed(e.into()))?;
    let record = BaseRecord::to(&cfg.kafka.control_topic).key(def.experiment.as_bytes()).payload(&bytes[..]);
    producer
        .send(record)
        .map_err(|(e, _)| CommandError::Failed(anyhow::anyhow!("cannot write to {}: {e}", cfg.kafka.control_topic)))?;
    let _ = producer.flush(LIMIT);
    let outcome = producer.context().0.lock().unwrap_or_else(|p| p.into_inner()).take();
    match outcome {
        Some(Ok(())) => Ok(()),
        Some(Err(e)) => Err(CommandError::Failed(anyhow::anyhow!("the broker did not take the record: {e}"))),
        None => Err(CommandError::Failed(anyhow::anyhow!("no answer from {} within {LIMIT:?}", cfg.kafka.brokers))),
    }
}

/// Who makes a change when `--by` is not given: the OS user.
pub fn os_user() -> String {
    std::env::var("USER").or_else(|_| std::env::var("USERNAME")).unwrap_or_else(|_| "unknown".into())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn known(toml: &str) -> Known {
        let cfg = Config::from_toml(toml, "test").expect("valid");
        Known { registry: Registry::new(cfg.clone(), None), cfg, published: BTreeMap::new() }
    }

    const DECLARED: &str = "[[experiments]]\nid = \"thumb-style\"\narms = [\"warm\", \"cool\"]\n";

    #[test]
    fn a_change_to_a_declared_experiment_starts_from_its_file_definition_at_revision_one() {
        let k = known(DECLARED);
        let d = k.prepare(&Change::Freeze("thumb-style".into()), "ana", Some("incident 42"), 5).expect("valid");
        assert_eq!((d.revision, d.state, d.arms.len()), (1, State::Frozen, 2));
        assert_eq!((d.changed_by.as_deref(), d.note.as_deref(), d.changed_at_ms), (Some("ana"), Some("incident 42"), Some(5)));
        k.registry.offer(0, Some(b"thumb-style"), Some(&serde_json::to_vec(&d).expect("JSON")));
        let next = k.prepare(&Change::Resume("thumb-style".into()), "ana", None, 6).expect("valid");
        assert_eq!((next.revision, next.state), (2, State::Learning));
    }

    #[test]
    fn a_missing_experiment_or_arm_is_refused_naming_it() {
        let k = known(DECLARED);
        let e = k.prepare(&Change::Freeze("nope".into()), "ana", None, 1).expect_err("missing");
        assert!(matches!(&e, CommandError::Refused(m) if m.contains("no experiment \"nope\"")), "{e}");
        let e = k.prepare(&Change::Conclude { experiment: "thumb-style".into(), winner: "gold".into() }, "ana", None, 1).expect_err("no arm");
        assert!(matches!(&e, CommandError::Refused(m) if m.contains("no arm \"gold\"; its arms: warm, cool")), "{e}");
    }

    #[test]
    fn a_definition_file_is_checked_before_anything_is_written() {
        let k = known("");
        let bad = Change::Define { text: "experiment = \"x\"\narms = [\"a\", \"b\"]\n[bounds]\nfloor = 0.7\n".into(), json: false };
        let e = k.prepare(&bad, "ana", None, 1).expect_err("floor");
        assert!(matches!(&e, CommandError::Refused(m) if m.contains("floor = 0.7 cannot hold")), "{e}");
    }
}
