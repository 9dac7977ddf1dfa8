//! apportion: allocates live traffic between the arms of experiments with multi-armed bandit
//! policies. See README.md for the job and DEVELOPERS.md for the map of the code.

pub mod app;
pub mod cli;
pub mod clock;
pub mod config;
pub mod console;
pub mod control;
pub mod core;
pub mod demo;
pub mod event;
pub mod shutdown;
pub mod sim;
pub mod stream;
pub mod telemetry;
