//! Round trips and merges of shard files.
use super::*;
