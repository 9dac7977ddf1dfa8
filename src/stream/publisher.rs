//! Publishing: the rule that says when an experiment's weights go out, the weights message of
//! the contract, and the rows the HTTP side serves.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::producer::BaseRecord;
use serde::Serialize;

use super::partition::{Entry, Holdings, PartitionState};
use super::producer::{send_with_retry, Sink};
use super::settings::Settings;
use crate::clock::now_ms;
use crate::core::report::{ArmReport, Report};
use crate::control::conclusion::conclusion;
use crate::core::{Allocation, Experiment, State};
use crate::telemetry::http::Served;
use crate::telemetry::table::{ArmRow, ExperimentRow};
/// What the weights message carries of an arm's figures: the contract's five fields, the
/// split of the pulls into matured and pending under an attribution window, and the decision
/// figures (probability of best, the confidence sequence, the lift over the control arm when
/// the experiment has one).
pub struct ArmSummary<'a>(&'a ArmReport);

impl Serialize for ArmSummary<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeMap;
        let a = self.0;
        let mut m = s.serialize_map(Some(a.figure_count()))?;
        a.write_figures(&mut m)?;
        m.end()
    }
}

#[derive(Serialize)]
pub struct WeightsMessage<'a> {
    pub experiment: &'a str,
    pub version: u64,
    /// The state in force (`learning`, `frozen`, `concluded`, `retired`).
    pub state: &'static str,
    /// The revision of the definition in force (0: the configuration file's).
    pub revision: u64,
    pub policy: &'a str,
    pub published_at_ms: i64,
    pub leader: Option<&'a str>,
    pub weights: BTreeMap<&'a str, f64>,
    pub arms: BTreeMap<&'a str, ArmSummary<'a>>,
    pub regret_estimate: f64,
    pub expected_loss: f64,
    /// The settle rule is met (README, "Is it done?").
    pub settled: bool,
}

impl<'a> WeightsMessage<'a> {
    /// The message of one publish. Arms a definition took out are not in it: services give
    /// them no traffic; their figures stay in `/experiments`.
    pub fn new(id: &'a str, exp: &'a Experiment, alloc: &'a Allocation, now_ms: i64) -> Self {
        let names = exp.arm_names();
        let active = |j: &usize| exp.is_active(*j);
        WeightsMessage {
            experiment: id,
            version: alloc.version,
            state: exp.lifecycle().state.as_str(),
            revision: exp.lifecycle().revision,
            policy: exp.policy_name(),
            published_at_ms: now_ms,
            leader: alloc.report.leader.map(|l| names[l].as_str()),
            weights: (0..names.len()).filter(active).map(|j| (names[j].as_str(), alloc.weights[j])).collect(),
            arms: (0..names.len()).filter(active).map(|j| (names[j].as_str(), ArmSummary(&alloc.report.arms[j]))).collect(),
            regret_estimate: alloc.report.regret_estimate,
            expected_loss: alloc.report.expected_loss,
            settled: alloc.report.settled,
        }
    }
}

/// Publishes weights on the interval, and refreshes what the HTTP side serves.
pub struct Publisher {
    s: Arc<Settings>,
    served: Arc<Served>,
    sink: Arc<Sink>,
    last_publish: Instant,
}

impl Publisher {
    pub fn new(s: Arc<Settings>, served: Arc<Served>, sink: Arc<Sink>) -> Publisher {
        Publisher { s, served, sink, last_publish: Instant::now() }
    }

    /// How long until the next publish round is due (zero if it is): the consumer waits for
    /// messages no longer than this, so that rounds start on time even when input is sparse.
    pub fn until_due(&self) -> Duration {
        self.s.publish_interval.saturating_sub(self.last_publish.elapsed())
    }

    /// Publishes the weights of every experiment that is due (an experiment is published by the
    /// partition that owns it, see [`Holdings`]), and refreshes the figures the HTTP side serves
    /// for every experiment that changed. Called between messages. An experiment is due on its
    /// first publish, on the heartbeat, when an arm joined, or when a weight moved by at least
    /// `publish.min_change`, or when a newer definition applies. A retired experiment publishes
    /// once more, saying so, then a tombstone for its key, and leaves what the HTTP side shows.
    /// An experiment created on first sight and idle for `defaults.idle_retire_seconds` is
    /// retired here.
    pub fn publish_due(&mut self, partitions: &mut BTreeMap<i32, PartitionState>, holdings: &Holdings, force: bool) {
        let s = &self.s;
        if !force && self.last_publish.elapsed() < s.publish_interval {
            return;
        }
        self.last_publish = Instant::now();
        let now = now_ms();
        let metrics = &self.served.metrics;
        let mut updates: Vec<(String, ExperimentRow)> = Vec::new();
        let mut gone: Vec<String> = Vec::new();
        for (&partition, part) in partitions.iter_mut() {
            if !part.snapshotted {
                // Not yet: see `PartitionState::snapshotted` (the pipeline writes one first).
                continue;
            }
            for (id, e) in part.experiments.iter_mut() {
                if holdings.owners.get(id) != Some(&partition) || e.farewell_sent {
                    continue;
                }
                if let Some(idle) = s.idle_retire_ms {
                    let last = e.exp.last_pull_ms().unwrap_or(now);
                    if e.exp.lifecycle().state != State::Retired && now - last >= idle && !s.is_defined(id) {
                        tracing::info!(experiment = %id, idle_seconds = (now - last) / 1000, "experiment created on first sight retired: no impression for defaults.idle_retire_seconds");
                        e.exp.retire(now);
                        e.redefined = true;
                    }
                }
                let retired = e.exp.lifecycle().state == State::Retired;
                let heartbeat = e.last_published.is_none_or(|t| t.elapsed() >= s.heartbeat);
                if !(e.changed || heartbeat || e.redefined) {
                    continue;
                }
                e.exp.mature();
                let weights = e.exp.weights(now, e.impressions_since.max(1));
                let moved = e
                    .exp
                    .last_weights()
                    .iter()
                    .zip(&weights)
                    .map(|(a, b)| if a.is_finite() { (a - b).abs() } else { f64::INFINITY })
                    .fold(0.0, f64::max);
                let new_arm = weights.len() != e.exp.last_weights().len();
                let publish = e.exp.version() == 0 || heartbeat || new_arm || e.redefined || retired || moved >= s.min_change;
                let report = if publish {
                    let version = e.exp.commit(&weights);
                    let alloc = Allocation { version, weights, report: e.exp.report(now) };
                    let msg = WeightsMessage::new(id, &e.exp, &alloc, now);
                    match serde_json::to_vec(&msg) {
                        Ok(bytes) => {
                            let record = BaseRecord::to(&s.weights_topic).key(id.as_bytes()).payload(&bytes[..]);
                            send_with_retry(&self.sink, record);
                        }
                        Err(err) => tracing::error!(experiment = %id, "cannot encode weights: {err}"),
                    }
                    if retired {
                        // The key leaves the compacted topic, so that no service keeps using
                        // the last split of an experiment that is over.
                        send_with_retry(&self.sink, BaseRecord::<[u8], [u8]>::to(&s.weights_topic).key(id.as_bytes()));
                        e.farewell_sent = true;
                        gone.push(id.clone());
                        tracing::info!(experiment = %id, version, "retired: last weights and a tombstone published");
                    }
                    if let Some(t) = e.first_applied.take() {
                        metrics.publish_latency.observe(t.elapsed().as_secs_f64());
                    }
                    e.last_published = Some(Instant::now());
                    e.impressions_since = 0;
                    alloc.report
                } else {
                    e.exp.report(now)
                };
                e.changed = false;
                e.redefined = false;
                self.conclude_if_settled(id, e, &report, now);
                if !e.farewell_sent {
                    updates.push((id.clone(), row(partition, &e.exp, &report, publish.then_some(now))));
                }
            }
        }
        if updates.is_empty() && gone.is_empty() {
            return;
        }
        let mut table = self.served.table.write().unwrap_or_else(|p| p.into_inner());
        for id in gone {
            table.rows.remove(&id);
            metrics.remove_experiment(&id);
        }
        for (id, mut r) in updates {
            if r.published_ms.is_none() {
                // Not published this round: the time of the last publish stands.
                r.published_ms = table.rows.get(&id).and_then(|old| old.published_ms);
            }
            table.rows.insert(id, r);
        }
    }
}

impl Publisher {
    /// Under `settle.auto_conclude`, writes the control record that concludes a settled,
    /// learning experiment on its leader, once per revision in force; the experiment concludes
    /// when the record is read back, like any other change.
    fn conclude_if_settled(&self, id: &str, e: &mut Entry, report: &Report, now: i64) {
        let exp = &e.exp;
        let revision = exp.lifecycle().revision;
        if !(report.settled && exp.spec().settle.auto_conclude && exp.lifecycle().state == State::Learning) || e.conclusion_sent == Some(revision) {
            return;
        }
        let in_force = self.s.control.get(id);
        let Some(def) = conclusion(id, exp, report, in_force.as_ref().map(|c| &c.definition), self.s.declared_as_written.get(id), now) else { return };
        match serde_json::to_vec(&def) {
            Ok(bytes) => {
                send_with_retry(&self.sink, BaseRecord::to(&self.s.control_topic).key(id.as_bytes()).payload(&bytes[..]));
                tracing::info!(experiment = %id, revision = def.revision, winner = def.winner.as_deref().unwrap_or("-"), "settled: concluding on the leader (settle.auto_conclude)");
                e.conclusion_sent = Some(revision);
            }
            Err(err) => tracing::error!(experiment = %id, "cannot encode the concluding record: {err}"),
        }
    }
}

/// What the HTTP side shows of one experiment, from its state and latest report.
fn row(partition: i32, exp: &Experiment, report: &Report, published_ms: Option<i64>) -> ExperimentRow {
    let weights = exp.last_weights();
    let published = exp.version() > 0;
    ExperimentRow {
        partition,
        lifecycle: exp.lifecycle().clone(),
        policy: exp.policy_name(),
        version: exp.version(),
        leader: report.leader,
        regret_estimate: report.regret_estimate,
        expected_loss: report.expected_loss,
        settled: report.settled,
        exploration: published.then(|| crate::core::report::exploration_ratio(weights, report.leader)),
        published_ms,
        arms: exp
            .arm_names()
            .iter()
            .zip(&report.arms)
            .enumerate()
            .map(|(j, (name, a))| ArmRow {
                name: name.clone(),
                figures: a.clone(),
                weight: weights.get(j).copied().filter(|w| w.is_finite() && exp.is_active(j)),
                removed: !exp.is_active(j),
            })
            .collect(),
    }
}
