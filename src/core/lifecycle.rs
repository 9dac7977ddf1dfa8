//! Where an experiment is in its life, as its definition in force says: learning, frozen,
//! concluded or retired, under which revision, and who changed it last.

use std::fmt;
use std::str::FromStr;

use serde::{Deserialize, Serialize};

/// The state of an experiment. The weights each state publishes are computed in
/// [`super::Experiment::weights`].
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum State {
    /// The policy sets the weights.
    #[default]
    Learning,
    /// The weights stay at the last published ones while statistics keep counting: the switch
    /// for an incident.
    Frozen,
    /// All weight goes to the winner (pinned arms keep theirs; the floor no longer applies);
    /// statistics keep counting.
    Concluded,
    /// Done: one last weights message says so, then the key is removed from the weights topic;
    /// events are refused.
    Retired,
}

impl State {
    pub const ALL: [State; 4] = [State::Learning, State::Frozen, State::Concluded, State::Retired];

    pub fn as_str(self) -> &'static str {
        match self {
            State::Learning => "learning",
            State::Frozen => "frozen",
            State::Concluded => "concluded",
            State::Retired => "retired",
        }
    }
}

impl fmt::Display for State {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

impl FromStr for State {
    type Err = String;
    fn from_str(s: &str) -> Result<State, String> {
        State::ALL.into_iter().find(|v| v.as_str() == s).ok_or_else(|| {
            let valid: Vec<&str> = State::ALL.iter().map(|v| v.as_str()).collect();
            format!("state = {s:?}; valid: {}", valid.join(", "))
        })
    }
}

/// What the definition in force says of an experiment beyond how it is run.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
#[serde(default)]
pub struct Lifecycle {
    pub state: State,
    /// 0 for the configuration file's definition; control records count from 1.
    pub revision: u64,
    /// The arm a concluded experiment sends its traffic to.
    pub winner: Option<String>,
    /// When the state in force began (ms since the epoch): the change's own time, or when the
    /// experiment was created; `None` in snapshots of older writers.
    pub state_since_ms: Option<i64>,
    pub changed_by: Option<String>,
    pub note: Option<String>,
}

impl Lifecycle {
    /// The lifecycle after `next`, a newer definition changed at `changed_at_ms`: the time the
    /// state began stays when the state does not change.
    pub fn followed_by(&self, mut next: Lifecycle, changed_at_ms: i64) -> Lifecycle {
        next.state_since_ms = if next.state == self.state { self.state_since_ms.or(Some(changed_at_ms)) } else { Some(changed_at_ms) };
        next
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_state_began_when_it_changed_not_at_every_later_revision() {
        let frozen = Lifecycle { state: State::Frozen, revision: 2, ..Lifecycle::default() };
        let first = Lifecycle::default().followed_by(frozen.clone(), 1_000);
        assert_eq!(first.state_since_ms, Some(1_000));
        let noted = first.followed_by(Lifecycle { revision: 3, note: Some("still".into()), ..frozen }, 5_000);
        assert_eq!(noted.state_since_ms, Some(1_000));
        let resumed = noted.followed_by(Lifecycle { revision: 4, ..Lifecycle::default() }, 9_000);
        assert_eq!(resumed.state_since_ms, Some(9_000));
    }

    #[test]
    fn states_read_as_they_are_written() {
        for s in State::ALL {
            assert_eq!(s.as_str().parse::<State>(), Ok(s));
        }
        assert!("paused".parse::<State>().unwrap_err().contains("learning, frozen, concluded, retired"));
    }
}
