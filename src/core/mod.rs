//! The pure core: statistics, intervals, policies, bounds and derived figures.
//!
//! No async, no I/O, no clock and no global random generator: event time and `now` are passed
//! in, and so is a seeded generator where a decision is random. Applying observations is
//! deterministic, so replaying the same events gives the same state bit for bit. The sidecar
//! and the simulator use this module as it is.

pub mod attribution;
pub mod beta;
pub mod decision;
pub mod draw;
pub mod experiment;
pub mod bounds;
pub mod interval;
pub mod kl;
pub mod lifecycle;
pub mod policy;
pub mod report;
pub mod sequence;
pub mod reward;
pub mod stats;

pub use attribution::Window;
pub use experiment::{Allocation, Credit, Experiment, ExperimentSpec, ExperimentState, Observation, Refusal};
pub use bounds::Bounds;
pub use lifecycle::{Lifecycle, State};
pub use policy::{Policy, PolicyName, PolicySpec};
pub use report::Report;
pub use reward::RewardModel;
