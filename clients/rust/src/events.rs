//! The events a service writes, in the sidecar's input format (its README, "Events in").

use serde::Serialize;

use crate::Assignment;

/// An impression written: what a reward for it needs.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Impression {
    pub event_id: String,
    pub experiment: String,
    pub arm: String,
    pub ts_ms: i64,
}

#[derive(Serialize)]
struct ImpressionEvent<'a> {
    event_id: &'a str,
    kind: &'static str,
    experiment: &'a str,
    arm: &'a str,
    ts_ms: i64,
    propensity: f64,
    #[serde(skip_serializing_if = "Option::is_none")]
    weights_version: Option<u64>,
}

#[derive(Serialize)]
struct RewardEvent<'a> {
    event_id: &'a str,
    kind: &'static str,
    experiment: &'a str,
    arm: &'a str,
    ts_ms: i64,
    reward: f64,
    impression_id: &'a str,
    impression_ts_ms: i64,
}

/// The impression event of `a`, with id `event_id`, at `ts_ms`.
pub fn impression_json(event_id: &str, a: &Assignment, ts_ms: i64) -> String {
    let e = ImpressionEvent {
        event_id,
        kind: "impression",
        experiment: &a.experiment,
        arm: &a.arm,
        ts_ms,
        propensity: a.propensity,
        weights_version: a.weights_version,
    };
    serde_json::to_string(&e).unwrap_or_default()
}

/// The reward event `event_id` of `value` for `imp`, at `ts_ms`.
pub fn reward_json(event_id: &str, imp: &Impression, value: f64, ts_ms: i64) -> String {
    let e = RewardEvent {
        event_id,
        kind: "reward",
        experiment: &imp.experiment,
        arm: &imp.arm,
        ts_ms,
        reward: value,
        impression_id: &imp.event_id,
        impression_ts_ms: imp.ts_ms,
    };
    serde_json::to_string(&e).unwrap_or_default()
}
