//! The weights message of the contract.

use std::collections::BTreeMap;

use serde::Serialize;

use crate::core::report::ArmReport;
use crate::core::{Allocation, Experiment};

/// What the weights message carries of an arm's figures: the contract's five fields.
pub struct ArmSummary<'a>(&'a ArmReport);

impl Serialize for ArmSummary<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let a = self.0;
        let mut m = s.serialize_map(Some(5))?;
        m.serialize_entry("pulls", &a.pulls)?;
        m.serialize_entry("reward", &a.reward)?;
        m.serialize_entry("mean", &a.mean)?;
        m.serialize_entry("ci_low", &a.ci_low)?;
        m.serialize_entry("ci_high", &a.ci_high)?;
        m.end()
    }
}

#[derive(Serialize)]
pub struct WeightsMessage<'a> {
    pub experiment: &'a str,
    pub version: u64,
    pub policy: &'a str,
    pub published_at_ms: i64,
    pub leader: Option<&'a str>,
    pub weights: BTreeMap<&'a str, f64>,
    pub arms: BTreeMap<&'a str, ArmSummary<'a>>,
    pub regret_estimate: f64,
}

impl<'a> WeightsMessage<'a> {
    pub fn new(id: &'a str, exp: &'a Experiment, alloc: &'a Allocation, now_ms: i64) -> Self {
        let names = exp.arm_names();
        WeightsMessage {
            experiment: id,
            version: alloc.version,
            policy: exp.policy_name(),
            published_at_ms: now_ms,
            leader: alloc.report.leader.map(|l| names[l].as_str()),
            weights: names.iter().map(String::as_str).zip(alloc.weights.iter().copied()).collect(),
            arms: names
                .iter()
                .zip(&alloc.report.arms)
                .map(|(n, a)| (n.as_str(), ArmSummary(a)))
                .collect(),
            regret_estimate: alloc.report.regret_estimate,
        }
    }
}
