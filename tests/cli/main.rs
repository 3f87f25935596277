//! Command-line tests: one binary, one module per feature.

mod util;

mod audit;
mod bad_input;
mod corpus;
mod crosscheck;
mod crosscheck_demo;
mod fuzz_inputs;
mod gate;
mod hardening_counts;
mod hardening_files;
mod hardening_ledger;
mod hardening_numeric;
mod hardening_reader;
mod inspect;
mod leftovers;
mod network;
mod next_obs;
mod policy;
mod projection;
mod report_edges;
mod report_html;
mod shards;
mod significance;
mod snapshots;
mod stacks;
mod sweep;
