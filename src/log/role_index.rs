//! The column of every role of one log, resolved once from its [`Schema`]: what both readers
//! index a record by, the CSV row parser ([`super::rows::RowParser`]) and the columnar plan
//! ([`super::columnar`]). A role added here reaches both readers at once.
//!
//! The vector block of a row holds, in this order: the score vector, the obs vector, the act
//! vector, the next observation, then the logged columns (`ColumnSpec::logged`). Assembly
//! ([`super::assemble`]) splits it in the same order.

use super::columns::{Role, Schema};

/// Column indices (into [`Schema::headers`]) of the scalar roles and of the vector block.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RoleIndex {
    /// The episode id, or the environment of a vector-environment layout.
    pub id: usize,
    pub reward: usize,
    pub step: Option<usize>,
    pub terminated: Option<usize>,
    pub truncated: Option<usize>,
    pub done: Option<usize>,
    pub value: Option<usize>,
    pub next_value: Option<usize>,
    pub q: Option<usize>,
    pub logp: Option<usize>,
    /// One column per element of the vector block, in block order (a list column's elements
    /// are `Schema::headers` entries past the file's columns).
    pub vectors: Vec<usize>,
}

impl RoleIndex {
    pub fn new(schema: &Schema) -> RoleIndex {
        let mut vectors = schema.scores.clone();
        vectors.extend(&schema.obs);
        vectors.extend(&schema.act);
        vectors.extend(&schema.next_obs);
        vectors.extend(&schema.logged);
        RoleIndex {
            id: schema.id_column(),
            reward: schema.column(Role::Reward).expect("a required role"),
            step: schema.column(Role::Step),
            terminated: schema.column(Role::Terminated),
            truncated: schema.column(Role::Truncated),
            done: schema.column(Role::Done),
            value: schema.column(Role::Value),
            next_value: schema.column(Role::NextValue),
            q: schema.column(Role::Q),
            logp: schema.column(Role::Logp),
            vectors,
        }
    }

    /// Values per row of the vector block.
    pub fn vector_width(&self) -> usize {
        self.vectors.len()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::log::ColumnSpec;

    // The block order is scores, obs, act, next obs, logged, whatever the header order.
    #[test]
    fn the_vector_block_follows_role_order() {
        let mut spec = ColumnSpec::default();
        spec.logged = vec!["adv".into()];
        let headers = [
            "adv",
            "next_obs_0",
            "act_0",
            "obs_0",
            "score_0",
            "reward",
            "episode",
        ];
        let s =
            Schema::resolve(&spec, headers.iter().map(|h| h.to_string()).collect(), "f").unwrap();
        let r = RoleIndex::new(&s);
        assert_eq!(r.vectors, vec![4, 3, 2, 1, 0]);
        assert_eq!((r.id, r.reward, r.step), (6, 5, None));
    }
}
