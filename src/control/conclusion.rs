//! The control record a settled experiment writes for itself under `settle.auto_conclude`:
//! the definition in force, concluded on the leader, one revision on, by `apportion`. It goes
//! to the control topic like a person's change, so every instance reads it, the registry
//! checks it, and the pipeline acts on it at its next publish, as for any other record.

use super::definition::Definition;
use crate::config::ExperimentConfig;
use crate::core::report::Report;
use crate::core::{Experiment, State};

/// Who the records this module writes are by.
pub const BY: &str = "apportion";

/// The record concluding `exp` (id `id`) on its leader, whose settled `report` says why.
/// `in_force` is the definition the control topic holds, `declared` the file's; with neither
/// (an experiment created on first sight) the record names the arms it has. `None` when there
/// is no leader.
pub fn conclusion(
    id: &str,
    exp: &Experiment,
    report: &Report,
    in_force: Option<&Definition>,
    declared: Option<&ExperimentConfig>,
    now_ms: i64,
) -> Option<Definition> {
    let leader = report.leader?;
    let mut def = match (in_force, declared) {
        (Some(d), _) => d.clone(),
        (None, Some(e)) => Definition::from_declared(e),
        (None, None) => {
            let bare = ExperimentConfig { id: id.to_string(), arms: exp.arm_names().to_vec(), ..ExperimentConfig::default() };
            Definition::from_declared(&bare)
        }
    };
    let a = &report.arms[leader];
    let fewest = (0..report.arms.len()).filter(|&j| exp.is_active(j)).map(|j| report.arms[j].matured_pulls()).min().unwrap_or(0);
    def.revision = def.revision.max(exp.lifecycle().revision) + 1;
    def.state = State::Concluded;
    def.winner = Some(exp.arm_names()[leader].clone());
    def.changed_by = Some(BY.to_string());
    def.changed_at_ms = Some(now_ms);
    def.note = Some(format!(
        "settled: P(best) {:.4}, expected loss {:.3e} per impression against a mean of {:.4}, fewest matured pulls {fewest}",
        a.best_probability, report.expected_loss, a.mean
    ));
    Some(def)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::core::{ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel};

    #[test]
    fn the_record_concludes_on_the_leader_one_revision_on() {
        let arms: Vec<String> = vec!["a".into(), "b".into()];
        let mut e = Experiment::new(ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bernoulli), &arms).expect("valid");
        e.observe(0, 0, Observation::Impression { count: 100 }).expect("pulls");
        e.observe(1, 0, Observation::Impression { count: 100 }).expect("pulls");
        for _ in 0..30 {
            e.observe(1, 0, Observation::reward(1.0)).expect("reward");
        }
        let declared = ExperimentConfig { id: "x".into(), arms: arms.clone(), ..ExperimentConfig::default() };
        let d = conclusion("x", &e, &e.report(0), None, Some(&declared), 7).expect("a leader");
        assert_eq!((d.revision, d.state, d.winner.as_deref(), d.changed_by.as_deref()), (1, State::Concluded, Some("b"), Some(BY)));
        assert_eq!(d.arms, arms);
        assert!(d.note.as_deref().is_some_and(|n| n.contains("fewest matured pulls 100")), "{:?}", d.note);
    }
}
