//! Command-line tests: one binary, one module per feature.

mod util;

mod audit;
mod bad_input;
mod corpus;
mod fuzz_inputs;
mod gate;
mod hardening_reader;
mod inspect;
mod policy;
mod sweep;
