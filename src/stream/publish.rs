//! The weights message of the contract.

use std::collections::BTreeMap;

use serde::Serialize;

use crate::core::{Allocation, Experiment};

#[derive(Serialize)]
pub struct ArmSummary {
    pub pulls: u64,
    pub reward: f64,
    pub mean: f64,
    pub ci_low: f64,
    pub ci_high: f64,
}

#[derive(Serialize)]
pub struct WeightsMessage<'a> {
    pub experiment: &'a str,
    pub version: u64,
    pub policy: &'a str,
    pub published_at_ms: i64,
    pub leader: Option<&'a str>,
    pub weights: BTreeMap<&'a str, f64>,
    pub arms: BTreeMap<&'a str, ArmSummary>,
    pub regret_estimate: f64,
}

impl<'a> WeightsMessage<'a> {
    pub fn new(id: &'a str, exp: &'a Experiment, alloc: &Allocation, now_ms: i64) -> Self {
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
                .map(|(n, a)| {
                    (n.as_str(), ArmSummary { pulls: a.pulls, reward: a.reward, mean: a.mean, ci_low: a.ci_low, ci_high: a.ci_high })
                })
                .collect(),
            regret_estimate: alloc.report.regret_estimate,
        }
    }
}
