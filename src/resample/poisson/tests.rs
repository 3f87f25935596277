//! Checks of the Poisson resampler.
use super::*;
