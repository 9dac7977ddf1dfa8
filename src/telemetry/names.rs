//! Every metric family the sidecar exports, named once. The registry ([`super::Metrics`]) and
//! the table ([`super::table`]) take their names from here, and `scripts/check-ops` reads this
//! file to check the dashboards and alert rules against it; a unit test checks that a scrape
//! holds exactly these families.

pub const EVENTS: &str = "apportion_events_total";
pub const DEAD_LETTERS: &str = "apportion_dead_letters_total";
pub const EXPERIMENT_SPLIT: &str = "apportion_experiment_split_total";
pub const UNMATCHED_REWARDS: &str = "apportion_unmatched_rewards_total";
pub const PUBLISH_LATENCY: &str = "apportion_publish_latency_seconds";
pub const CONSUMER_LAG: &str = "apportion_consumer_lag_messages";
pub const SNAPSHOT_TIME: &str = "apportion_state_snapshot_timestamp_seconds";
pub const BUILD_INFO: &str = "apportion_build_info";
pub const READY: &str = "apportion_ready";
pub const CONTROL_RECORDS: &str = "apportion_control_records_total";
pub const LATE_REWARDS: &str = "apportion_late_rewards_total";
pub const UNATTRIBUTED_REWARDS: &str = "apportion_unattributed_rewards_total";

pub const ARM_PULLS: &str = "apportion_arm_pulls_total";
pub const ARM_REWARD: &str = "apportion_arm_reward_total";
pub const ARM_MEAN: &str = "apportion_arm_mean";
pub const ARM_CONFIDENCE_WIDTH: &str = "apportion_arm_confidence_width";
pub const ARM_WEIGHT: &str = "apportion_arm_weight_ratio";
pub const ARM_UNDECIDED: &str = "apportion_arm_undecided";
pub const ARM_LAST_PULL: &str = "apportion_arm_last_pull_timestamp_seconds";
pub const ARM_EXCESS_REWARDS: &str = "apportion_arm_excess_rewards";
pub const ARM_PENDING_PULLS: &str = "apportion_arm_pending_pulls";
pub const ARM_BEST_PROBABILITY: &str = "apportion_arm_best_probability";
pub const ARM_MEAN_LOWER: &str = "apportion_arm_mean_lower";
pub const ARM_MEAN_UPPER: &str = "apportion_arm_mean_upper";
pub const ARM_LIFT_LOWER: &str = "apportion_arm_lift_lower";
pub const ARM_LIFT_UPPER: &str = "apportion_arm_lift_upper";
pub const EXPERIMENT_REGRET: &str = "apportion_experiment_regret_estimate";
pub const EXPERIMENT_EXPLORATION: &str = "apportion_experiment_exploration_ratio";
pub const EXPERIMENT_EXPECTED_LOSS: &str = "apportion_experiment_expected_loss";
pub const EXPERIMENT_SETTLED: &str = "apportion_experiment_settled";
pub const WEIGHTS_VERSION: &str = "apportion_weights_version";
pub const WEIGHTS_PUBLISHED: &str = "apportion_weights_published_timestamp_seconds";
pub const EXPERIMENT_STATE: &str = "apportion_experiment_state";
pub const EXPERIMENT_REVISION: &str = "apportion_experiment_revision";
pub const EXPERIMENT_STATE_SINCE: &str = "apportion_experiment_state_since_timestamp_seconds";

/// Families that are histograms (their series end in `_bucket`, `_sum` and `_count`).
pub const HISTOGRAMS: [&str; 1] = [PUBLISH_LATENCY];

/// Every family, instance-wide ones first.
pub const ALL: [&str; 35] = [
    EVENTS,
    DEAD_LETTERS,
    EXPERIMENT_SPLIT,
    UNMATCHED_REWARDS,
    PUBLISH_LATENCY,
    CONSUMER_LAG,
    SNAPSHOT_TIME,
    BUILD_INFO,
    READY,
    CONTROL_RECORDS,
    LATE_REWARDS,
    UNATTRIBUTED_REWARDS,
    ARM_PULLS,
    ARM_REWARD,
    ARM_MEAN,
    ARM_CONFIDENCE_WIDTH,
    ARM_WEIGHT,
    ARM_UNDECIDED,
    ARM_LAST_PULL,
    ARM_EXCESS_REWARDS,
    ARM_PENDING_PULLS,
    ARM_BEST_PROBABILITY,
    ARM_MEAN_LOWER,
    ARM_MEAN_UPPER,
    ARM_LIFT_LOWER,
    ARM_LIFT_UPPER,
    EXPERIMENT_REGRET,
    EXPERIMENT_EXPLORATION,
    EXPERIMENT_EXPECTED_LOSS,
    EXPERIMENT_SETTLED,
    WEIGHTS_VERSION,
    WEIGHTS_PUBLISHED,
    EXPERIMENT_STATE,
    EXPERIMENT_REVISION,
    EXPERIMENT_STATE_SINCE,
];
