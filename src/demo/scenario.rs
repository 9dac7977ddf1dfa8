//! The demo's fictional world: Simmer, a recipe-video app, and the true (hidden) behaviour of
//! its viewers. Invented numbers, for the demo only; the sidecar never sees them.

/// True mean reward of each arm, in the experiment's `unit` per impression.
pub struct Truth {
    pub experiment: &'static str,
    pub arms: &'static [(&'static str, f64)],
    /// `None` for click-like 0/1 rewards; `Some(max)` for amounts in [0, max].
    pub reward_max: Option<f64>,
    /// What one unit of reward is: a mean is in these per impression, a regret in these.
    pub unit: &'static str,
    /// Share of the app's impressions that go through this experiment.
    pub traffic: f64,
}

pub const WORLD: &[Truth] = &[
    Truth {
        experiment: "thumb-style",
        arms: &[("steam-closeup", 0.085), ("hands-on", 0.060), ("plated-top", 0.045), ("text-overlay", 0.030)],
        reward_max: None,
        unit: "plays",
        traffic: 0.45,
    },
    Truth {
        experiment: "feed-ranker",
        arms: &[("recency", 14.0), ("chef-affinity", 30.0), ("seasonal", 20.0)],
        reward_max: Some(60.0),
        unit: "watch seconds",
        traffic: 0.30,
    },
    Truth {
        experiment: "save-button",
        arms: &[("heart", 0.09), ("bookmark", 0.16), ("plus", 0.06)],
        reward_max: None,
        unit: "saves",
        traffic: 0.25,
    },
];

/// The arm with the highest true mean.
pub fn best_arm(t: &Truth) -> &'static str {
    t.arms.iter().fold(t.arms[0], |b, a| if a.1 > b.1 { *a } else { b }).0
}
