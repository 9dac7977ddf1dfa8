//! The definitions in force, as this instance has read them from the control topic, and the
//! changes the pipeline has yet to act on.

use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, Mutex};

use prometheus::IntCounterVec;

use super::definition::{Checked, Definition};
use crate::config::Config;

/// What became of one control record.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Outcome {
    /// Now in force (or, for a null value, forgotten).
    Applied,
    /// Its revision is not above the one in force.
    Stale,
    /// It failed the checks.
    Invalid,
}

impl Outcome {
    pub const ALL: [Outcome; 3] = [Outcome::Applied, Outcome::Stale, Outcome::Invalid];

    pub fn as_str(self) -> &'static str {
        match self {
            Outcome::Applied => "applied",
            Outcome::Stale => "stale",
            Outcome::Invalid => "invalid",
        }
    }
}

#[derive(Default)]
struct Inner {
    in_force: HashMap<String, Arc<Checked>>,
    /// Definitions applied since the pipeline last asked, in the order they were read.
    pending: Vec<Arc<Checked>>,
}

/// Shared by the control follower (which writes it) and the pipeline (which reads it).
pub struct Registry {
    cfg: Config,
    inner: Mutex<Inner>,
    caught_up: AtomicBool,
    /// `apportion_control_records_total`, when this registry serves a sidecar.
    outcomes: Option<IntCounterVec>,
}

impl Registry {
    /// An empty registry that checks records against `cfg` (its defaults and limits).
    pub fn new(cfg: Config, outcomes: Option<IntCounterVec>) -> Registry {
        if let Some(c) = &outcomes {
            for o in Outcome::ALL {
                c.with_label_values(&[o.as_str()]);
            }
        }
        Registry { cfg, inner: Mutex::new(Inner::default()), caught_up: AtomicBool::new(false), outcomes }
    }

    fn lock(&self) -> std::sync::MutexGuard<'_, Inner> {
        self.inner.lock().unwrap_or_else(|p| p.into_inner())
    }

    /// Takes one control record (its key and value; a null value forgets the experiment's
    /// definition): checks it, and puts it in force when its revision is above the one in
    /// force. Counts and logs the outcome; nothing a record holds can stop the caller.
    pub fn offer(&self, offset: i64, key: Option<&[u8]>, value: Option<&[u8]>) -> Outcome {
        let shown_key = key.map(String::from_utf8_lossy).unwrap_or_default().into_owned();
        let outcome = match value {
            None => {
                let forgotten = self.lock().in_force.remove(&shown_key);
                if let Some(old) = forgotten {
                    tracing::info!(experiment = %shown_key, revision = old.revision(), offset, "control record: definition forgotten; experiments running keep it until they end");
                }
                Outcome::Applied
            }
            Some(bytes) => match Definition::from_json(bytes).and_then(|d| d.check(key, &self.cfg)) {
                Err(reason) => {
                    tracing::warn!(key = %shown_key, offset, "control record refused: {reason}");
                    Outcome::Invalid
                }
                Ok(checked) => {
                    let mut inner = self.lock();
                    let in_force = inner.in_force.get(checked.id()).map_or(0, |c| c.revision());
                    if checked.revision() <= in_force {
                        tracing::warn!(
                            experiment = %checked.id(),
                            revision = checked.revision(),
                            in_force,
                            offset,
                            "control record ignored: its revision is not above the one in force"
                        );
                        Outcome::Stale
                    } else {
                        tracing::info!(
                            experiment = %checked.id(),
                            revision = checked.revision(),
                            state = %checked.lifecycle.state,
                            changed_by = checked.lifecycle.changed_by.as_deref().unwrap_or("-"),
                            note = checked.lifecycle.note.as_deref().unwrap_or("-"),
                            offset,
                            "control record applied"
                        );
                        let checked = Arc::new(checked);
                        inner.in_force.insert(checked.id().to_string(), checked.clone());
                        inner.pending.push(checked);
                        Outcome::Applied
                    }
                }
            },
        };
        if let Some(c) = &self.outcomes {
            c.with_label_values(&[outcome.as_str()]).inc();
        }
        outcome
    }

    /// The definition in force for `experiment`, if a control record gave one.
    pub fn get(&self, experiment: &str) -> Option<Arc<Checked>> {
        self.lock().in_force.get(experiment).cloned()
    }

    /// Every definition in force.
    pub fn all(&self) -> Vec<Arc<Checked>> {
        self.lock().in_force.values().cloned().collect()
    }

    /// The definitions applied since the last call, in the order they were read.
    pub fn take_pending(&self) -> Vec<Arc<Checked>> {
        std::mem::take(&mut self.lock().pending)
    }

    /// Marks the control topic as read to its end (as it was at start).
    pub fn set_caught_up(&self) {
        self.caught_up.store(true, Ordering::SeqCst);
    }

    pub fn is_caught_up(&self) -> bool {
        self.caught_up.load(Ordering::SeqCst)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn registry() -> Registry {
        Registry::new(Config::from_toml("", "test").expect("valid"), None)
    }

    fn def(revision: u64, state: &str) -> Vec<u8> {
        format!(r#"{{"experiment":"e","revision":{revision},"state":"{state}","arms":["a","b"]}}"#).into_bytes()
    }

    #[test]
    fn a_record_not_above_the_revision_in_force_is_stale_and_changes_nothing() {
        let r = registry();
        assert_eq!(r.offer(0, Some(b"e"), Some(&def(3, "frozen"))), Outcome::Applied);
        assert_eq!(r.offer(1, Some(b"e"), Some(&def(3, "learning"))), Outcome::Stale);
        assert_eq!(r.offer(2, Some(b"e"), Some(&def(2, "learning"))), Outcome::Stale);
        assert_eq!(r.offer(3, Some(b"e"), Some(b"{")), Outcome::Invalid);
        let now = r.get("e").expect("in force");
        assert_eq!((now.revision(), now.lifecycle.state.as_str()), (3, "frozen"));
        assert_eq!(r.take_pending().len(), 1, "only the applied one waits for the pipeline");
        assert_eq!(r.offer(4, Some(b"e"), Some(&def(4, "learning"))), Outcome::Applied);
        assert_eq!(r.take_pending()[0].revision(), 4);
        assert_eq!(r.offer(5, Some(b"e"), None), Outcome::Applied);
        assert!(r.get("e").is_none(), "a null value forgets the definition");
    }
}
