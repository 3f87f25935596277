//! Command-line tests: one binary, one module per feature.

mod util;

mod audit;
mod bad_input;
mod gate;
mod inspect;
mod sweep;
