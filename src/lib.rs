//! gradaudit: audits policy-gradient estimators on recorded rollouts.
//!
//! Data flows one way: [`log`] reads a CSV rollout log into [`episode::Episode`]s; estimators
//! turn each episode into per-episode contributions; the resampler and statistics compare the
//! estimators; reports format the result. The binary (`main.rs`, `cli.rs`) only parses options.

pub mod episode;
pub mod error;
pub mod log;
pub mod warnings;

pub use error::{Error, Result};
pub mod audit;
pub mod cli;
pub mod contrib;
pub mod critic;
pub mod crosscheck;
pub mod estimator;
pub mod fuzzing;
pub mod gate;
pub mod inspect;
pub mod limits;
pub mod output;
pub mod policy;
pub mod report;
pub mod resample;
pub mod shard;
pub mod sketch;
pub mod stats;
pub mod sweep;
#[cfg(test)]
mod testkit;
