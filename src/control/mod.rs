//! Experiments changed while the sidecars run: definitions on the control topic (compacted,
//! key = experiment id), read whole by every instance and followed while it runs.
//!
//! ```text
//! apportion experiment … ──► control topic ──► follower ──► registry ──► pipeline (owner acts
//!                                                                        at its next publish)
//! ```
//!
//! The control topic is the only way to change an experiment at run time; who may write to it
//! is the broker's authorisation, not the sidecar's.

pub mod command;
pub mod conclusion;
pub mod definition;
pub mod follower;
pub mod listing;
pub mod reader;
pub mod registry;

pub use definition::{Checked, Definition};
pub use registry::{Outcome, Registry};
