//! The per-experiment and per-arm figures this instance holds, kept as plain numbers and
//! rendered only when asked for: as Prometheus text on `/metrics` and as JSON on `/experiments`.
//!
//! Ten thousand experiments of ten arms make 100 000 arms and, at eight series per arm, some
//! 800 000 series. Kept as `prometheus` metric objects (each with its own label strings and
//! atomics) they took about 700 MiB; kept here they take about 110 bytes per arm, and the
//! pipeline touches them once per publish round instead of once per event.

use std::collections::BTreeMap;
use std::fmt::Write as _;

use serde::ser::{Serialize, SerializeMap, Serializer};

use super::names;
use crate::core::report::ArmReport;
use crate::core::Lifecycle;

/// One arm as served, as of the experiment's last publish round: its name, the figures the
/// core reported, and the weight last published.
#[derive(Clone, Debug, PartialEq)]
pub struct ArmRow {
    pub name: String,
    pub figures: ArmReport,
    /// Last published weight; `None` before the arm's first publish and for an arm taken out.
    pub weight: Option<f64>,
    /// Taken out by a definition: no weight, statistics kept.
    pub removed: bool,
}

/// One experiment's figures.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct ExperimentRow {
    pub partition: i32,
    /// State, revision and last change of the definition in force.
    pub lifecycle: Lifecycle,
    pub policy: &'static str,
    pub version: u64,
    /// Index into `arms`.
    pub leader: Option<usize>,
    pub regret_estimate: f64,
    /// Expected loss per impression of sending everything to the leader (`core::decision`).
    pub expected_loss: f64,
    /// The settle rule is met.
    pub settled: bool,
    /// 1 − the leader's weight, from the last publish.
    pub exploration: Option<f64>,
    pub published_ms: Option<i64>,
    pub arms: Vec<ArmRow>,
}

/// Experiment id → its row.
#[derive(Default)]
pub struct Table {
    pub rows: BTreeMap<String, ExperimentRow>,
}

type ArmValue = fn(&ArmRow) -> Option<f64>;
type ExperimentValue = fn(&ExperimentRow) -> Option<f64>;

/// Per-arm families: name, type, help, value (None: no sample).
const ARM_FAMILIES: [(&str, &str, &str, ArmValue); 14] = [
    (names::ARM_PULLS, "counter", "Impressions applied to the arm", |a| Some(a.figures.pulls as f64)),
    (names::ARM_REWARD, "counter", "Reward applied to the arm, in reward units", |a| Some(a.figures.reward)),
    (names::ARM_MEAN, "gauge", "Estimated mean reward of the arm", |a| Some(a.figures.mean)),
    (
        names::ARM_CONFIDENCE_WIDTH,
        "gauge",
        "Width of the two-sided 95% interval on the arm's mean",
        |a| Some(a.figures.width()),
    ),
    (names::ARM_WEIGHT, "gauge", "Traffic weight last published for the arm", |a| a.weight),
    (
        names::ARM_UNDECIDED,
        "gauge",
        "1 when the arm's confidence sequence still reaches the leader's lower end",
        |a| Some(if a.figures.undecided { 1.0 } else { 0.0 }),
    ),
    (
        names::ARM_LAST_PULL,
        "gauge",
        "Event time of the arm's newest impression",
        |a| a.figures.last_pull_ms.map(|t| t as f64 / 1000.0),
    ),
    (
        names::ARM_EXCESS_REWARDS,
        "gauge",
        "Rewards beyond one per impression under a 0/1 reward model, left out of the policy's success count",
        |a| Some(a.figures.excess_rewards),
    ),
    (
        names::ARM_PENDING_PULLS,
        "gauge",
        "Impressions waiting for their attribution window to close; not yet in the mean, the interval or the policy's inputs",
        |a| Some(a.figures.pending_pulls as f64),
    ),
    (
        names::ARM_BEST_PROBABILITY,
        "gauge",
        "Posterior probability that the arm is the best (uniform prior), whatever the policy",
        |a| Some(a.figures.best_probability),
    ),
    (
        names::ARM_MEAN_LOWER,
        "gauge",
        "Lower end of the anytime-valid 95% confidence sequence on the arm's mean (all arms together)",
        |a| Some(a.figures.cs_low),
    ),
    (
        names::ARM_MEAN_UPPER,
        "gauge",
        "Upper end of the anytime-valid 95% confidence sequence on the arm's mean (all arms together)",
        |a| Some(a.figures.cs_high),
    ),
    (
        names::ARM_LIFT_LOWER,
        "gauge",
        "Lower end of the anytime-valid interval on the arm's mean minus the control arm's",
        |a| a.figures.lift.map(|l| l.low),
    ),
    (
        names::ARM_LIFT_UPPER,
        "gauge",
        "Upper end of the anytime-valid interval on the arm's mean minus the control arm's",
        |a| a.figures.lift.map(|l| l.high),
    ),
];

/// How many families [`Table::write_family`] writes.
pub const FAMILIES: usize = ARM_FAMILIES.len() + EXPERIMENT_FAMILIES.len();

/// Per-experiment families. The state family carries the state as a label, with value 1
/// ([`Table::write_family`] adds it).
const EXPERIMENT_FAMILIES: [(&str, &str, &str, ExperimentValue); 9] = [
    (
        names::EXPERIMENT_REGRET,
        "gauge",
        "Estimated cumulative pseudo-regret, in reward units",
        |e| Some(e.regret_estimate),
    ),
    (names::EXPERIMENT_EXPLORATION, "gauge", "1 minus the leader's weight", |e| e.exploration),
    (
        names::EXPERIMENT_EXPECTED_LOSS,
        "gauge",
        "Expected shortfall per impression, in reward units, of sending everything to the leader, under the posterior",
        |e| Some(e.expected_loss),
    ),
    (
        names::EXPERIMENT_SETTLED,
        "gauge",
        "1 when the settle rule is met: the leader is probably best and choosing it costs little",
        |e| Some(if e.settled { 1.0 } else { 0.0 }),
    ),
    (
        names::WEIGHTS_VERSION,
        "gauge",
        "Version of the experiment's last published weights",
        |e| (e.version > 0).then_some(e.version as f64),
    ),
    (
        names::WEIGHTS_PUBLISHED,
        "gauge",
        "When the experiment's weights were last published",
        |e| e.published_ms.map(|t| t as f64 / 1000.0),
    ),
    (names::EXPERIMENT_STATE, "gauge", "1 for the experiment's state in force (label state)", |_| Some(1.0)),
    (
        names::EXPERIMENT_REVISION,
        "gauge",
        "Revision of the definition in force (0: the configuration file's)",
        |e| Some(e.lifecycle.revision as f64),
    ),
    (
        names::EXPERIMENT_STATE_SINCE,
        "gauge",
        "When the state in force began (the change's own time)",
        |e| e.lifecycle.state_since_ms.map(|t| t as f64 / 1000.0),
    ),
];

impl Table {
    /// Writes part of family `f` (0..FAMILIES): its header when `after` is `None`, then the
    /// samples of the experiments after `after`, until `out` holds `limit` bytes. Returns the
    /// last experiment written if more remain, `None` once the family is complete. Lets the
    /// HTTP side write a large scrape piece by piece, taking the lock for one piece at a time.
    pub fn write_family(&self, f: usize, after: Option<&str>, out: &mut String, limit: usize) -> Option<String> {
        use std::ops::Bound::{Excluded, Unbounded};
        let (name, kind, help) = if f < ARM_FAMILIES.len() {
            let (n, k, h, _) = ARM_FAMILIES[f];
            (n, k, h)
        } else {
            let (n, k, h, _) = EXPERIMENT_FAMILIES[f - ARM_FAMILIES.len()];
            (n, k, h)
        };
        let rows = match after {
            None => {
                let _ = writeln!(out, "# HELP {name} {help}\n# TYPE {name} {kind}");
                self.rows.range::<str, _>((Unbounded, Unbounded))
            }
            Some(k) => self.rows.range::<str, _>((Excluded(k), Unbounded)),
        };
        for (id, row) in rows {
            if f < ARM_FAMILIES.len() {
                let value = ARM_FAMILIES[f].3;
                for arm in &row.arms {
                    if let Some(v) = value(arm) {
                        sample(out, name, &[("experiment", id), ("arm", &arm.name)], v);
                    }
                }
            } else if name == names::EXPERIMENT_STATE {
                sample(out, name, &[("experiment", id), ("state", row.lifecycle.state.as_str())], 1.0);
            } else if let Some(v) = (EXPERIMENT_FAMILIES[f - ARM_FAMILIES.len()].3)(row) {
                sample(out, name, &[("experiment", id)], v);
            }
            if out.len() >= limit {
                return Some(id.clone());
            }
        }
        None
    }

    /// What `/experiments` shows, as JSON.
    pub fn to_json(&self) -> String {
        serde_json::to_string(self).unwrap_or_else(|_| "{}".into())
    }
}

fn sample(out: &mut String, name: &str, labels: &[(&str, &str)], v: f64) {
    out.push_str(name);
    out.push('{');
    for (i, (k, val)) in labels.iter().enumerate() {
        if i > 0 {
            out.push(',');
        }
        out.push_str(k);
        out.push_str("=\"");
        escape_label(out, val);
        out.push('"');
    }
    out.push_str("} ");
    push_float(out, v);
    out.push('\n');
}

/// Label values escape backslash, double quote and line feed (text format 0.0.4).
fn escape_label(out: &mut String, v: &str) {
    for c in v.chars() {
        match c {
            '\\' => out.push_str("\\\\"),
            '"' => out.push_str("\\\""),
            '\n' => out.push_str("\\n"),
            c => out.push(c),
        }
    }
}

/// Floats as the text format reads them: `NaN`, `+Inf`, `-Inf`, or a decimal/exponent form.
fn push_float(out: &mut String, v: f64) {
    if v.is_nan() {
        out.push_str("NaN");
    } else if v.is_infinite() {
        out.push_str(if v > 0.0 { "+Inf" } else { "-Inf" });
    } else if v == v.trunc() && v.abs() < 1e15 {
        let _ = write!(out, "{}", v as i64);
    } else {
        let _ = write!(out, "{v:?}");
    }
}

impl Serialize for Table {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(Some(self.rows.len()))?;
        for (id, row) in &self.rows {
            m.serialize_entry(id, row)?;
        }
        m.end()
    }
}

impl Serialize for ExperimentRow {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        struct Arms<'a>(&'a [ArmRow]);
        impl Serialize for Arms<'_> {
            fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
                let mut m = s.serialize_map(Some(self.0.len()))?;
                for a in self.0 {
                    m.serialize_entry(&a.name, &ArmJson(a))?;
                }
                m.end()
            }
        }
        #[derive(serde::Serialize)]
        struct View<'a> {
            partition: i32,
            state: &'a str,
            revision: u64,
            state_since_ms: Option<i64>,
            changed_by: Option<&'a str>,
            note: Option<&'a str>,
            policy: &'a str,
            version: u64,
            leader: Option<&'a str>,
            regret_estimate: f64,
            expected_loss: f64,
            settled: bool,
            arms: Arms<'a>,
        }
        let l = &self.lifecycle;
        View {
            partition: self.partition,
            state: l.state.as_str(),
            revision: l.revision,
            state_since_ms: l.state_since_ms,
            changed_by: l.changed_by.as_deref(),
            note: l.note.as_deref(),
            policy: self.policy,
            version: self.version,
            leader: self.leader.and_then(|l| self.arms.get(l)).map(|a| a.name.as_str()),
            regret_estimate: self.regret_estimate,
            expected_loss: self.expected_loss,
            settled: self.settled,
            arms: Arms(&self.arms),
        }
        .serialize(s)
    }
}

struct ArmJson<'a>(&'a ArmRow);

impl Serialize for ArmJson<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let (a, f) = (self.0, &self.0.figures);
        let mut m = s.serialize_map(Some(f.figure_count() + 3))?;
        f.write_figures(&mut m)?;
        m.serialize_entry("weight", &a.weight)?;
        m.serialize_entry("excess_rewards", &f.excess_rewards)?;
        m.serialize_entry("removed", &a.removed)?;
        m.end()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Every family in one piece.
    fn whole_text(t: &Table) -> String {
        let mut out = String::new();
        for f in 0..FAMILIES {
            let mut after = None;
            while let Some(last) = t.write_family(f, after.as_deref(), &mut out, usize::MAX) {
                after = Some(last);
            }
        }
        out
    }

    fn table() -> Table {
        let arm = |name: &str, pulls, weight| ArmRow {
            name: name.into(),
            figures: ArmReport {
                pulls,
                pending_pulls: 0,
                best_probability: 0.5,
                reward: 3.0,
                mean: 0.25,
                ci_low: 0.1,
                ci_high: 0.4,
                cs_low: 0.05,
                cs_high: 0.5,
                undecided: true,
                lift: None,
                last_pull_ms: Some(1_764_547_200_500),
                excess_rewards: 0.0,
            },
            weight,
            removed: false,
        };
        let mut t = Table::default();
        t.rows.insert(
            "a\"b".into(),
            ExperimentRow {
                partition: 1,
                lifecycle: Lifecycle::default(),
                policy: "thompson",
                version: 3,
                leader: Some(1),
                regret_estimate: 1.5,
                expected_loss: 0.01,
                settled: false,
                exploration: Some(0.4),
                published_ms: Some(1_764_547_201_000),
                arms: vec![arm("x", 12, Some(0.4)), arm("y\\z", 8, None)],
            },
        );
        t
    }

    #[test]
    fn prometheus_text_escapes_labels_and_skips_unknown_values() {
        let out = whole_text(&table());
        assert!(out.contains("apportion_arm_pulls_total{experiment=\"a\\\"b\",arm=\"y\\\\z\"} 8\n"), "{out}");
        assert!(out.contains("apportion_arm_weight_ratio{experiment=\"a\\\"b\",arm=\"x\"} 0.4\n"));
        assert!(!out.contains("apportion_arm_weight_ratio{experiment=\"a\\\"b\",arm=\"y"), "no weight published yet: no sample");
        assert!(out.contains("apportion_arm_last_pull_timestamp_seconds{experiment=\"a\\\"b\",arm=\"x\"} 1764547200.5\n"));
        assert!(out.contains("apportion_weights_version{experiment=\"a\\\"b\"} 3\n"));
        assert!(out.contains("# TYPE apportion_arm_pulls_total counter\n"));
        assert!(out.contains("apportion_experiment_state{experiment=\"a\\\"b\",state=\"learning\"} 1\n"), "{out}");
        assert!(out.contains("apportion_experiment_revision{experiment=\"a\\\"b\"} 0\n"));
    }

    #[test]
    fn text_written_piece_by_piece_is_the_same_text() {
        let mut t = table();
        for i in 0..50 {
            let mut r = t.rows["a\"b"].clone();
            r.arms[0].figures.pulls = i;
            t.rows.insert(format!("exp-{i}"), r);
        }
        let whole = whole_text(&t);
        let (mut joined, mut pieces) = (String::new(), 0);
        for f in 0..FAMILIES {
            let mut after = None;
            loop {
                let mut piece = String::new();
                let next = t.write_family(f, after.as_deref(), &mut piece, 1_000);
                joined.push_str(&piece);
                pieces += 1;
                match next {
                    Some(k) => after = Some(k),
                    None => break,
                }
            }
        }
        assert_eq!(joined, whole);
        assert!(pieces > 2 * FAMILIES, "{pieces} pieces");
    }

    #[test]
    fn floats_are_written_as_the_text_format_reads_them() {
        let mut out = String::new();
        for v in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, 0.5, 3.0, 1e300, -2.5e-9] {
            push_float(&mut out, v);
            out.push(' ');
        }
        assert_eq!(out, "NaN +Inf -Inf 0.5 3 1e300 -2.5e-9 ");
    }

    #[test]
    fn json_names_the_leader_and_every_arm() {
        let v: serde_json::Value = serde_json::from_str(&table().to_json()).expect("JSON");
        assert_eq!(v["a\"b"]["leader"], "y\\z");
        assert_eq!(v["a\"b"]["arms"]["x"]["pulls"], 12);
        assert_eq!(v["a\"b"]["arms"]["y\\z"]["weight"], serde_json::Value::Null);
        assert_eq!(v["a\"b"]["arms"]["x"]["excess_rewards"], 0.0, "the clamped excess is shown, not hidden");
    }
}
