//! Column roles: which header of a log plays which part (episode id, reward, score vector...),
//! with the user's remappings, and a suggestion when a required header is missing.

use crate::error::{Error, Position, Result};
use serde::Serialize;

/// A single-column role. Vector roles (score, obs, act) are found by header prefix instead.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Role {
    Episode,
    Step,
    Reward,
    Terminated,
    Truncated,
    Value,
    NextValue,
    Q,
    Logp,
}

impl Role {
    pub const ALL: [Role; 9] = [
        Role::Episode,
        Role::Step,
        Role::Reward,
        Role::Terminated,
        Role::Truncated,
        Role::Value,
        Role::NextValue,
        Role::Q,
        Role::Logp,
    ];

    /// The role's name on the command line (`--col NAME=HEADER`), also its default header.
    pub fn key(self) -> &'static str {
        match self {
            Role::Episode => "episode",
            Role::Step => "step",
            Role::Reward => "reward",
            Role::Terminated => "terminated",
            Role::Truncated => "truncated",
            Role::Value => "value",
            Role::NextValue => "next_value",
            Role::Q => "q",
            Role::Logp => "logp",
        }
    }

    pub fn required(self) -> bool {
        matches!(self, Role::Episode | Role::Reward)
    }

    fn index(self) -> usize {
        self as usize
    }

    pub fn parse(key: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.key() == key)
    }
}

/// The vector roles, found by a header prefix followed by an index.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VectorRole {
    Score,
    Obs,
    Act,
}

/// What the user asked for: a header per role and a prefix per vector role.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ColumnSpec {
    headers: [String; 9],
    /// Roles the user named explicitly; a missing explicit header is an error even if optional.
    explicit: [bool; 9],
    pub score_prefix: String,
    /// Headers of per-step columns carried into each episode as they are (`Episode::logged`):
    /// a training stack's own advantages or value targets, to check or to audit.
    pub logged: Vec<String>,
    pub obs_prefix: String,
    pub act_prefix: String,
}

impl Default for ColumnSpec {
    fn default() -> Self {
        ColumnSpec {
            headers: Role::ALL.map(|r| r.key().to_string()),
            explicit: [false; 9],
            score_prefix: "score_".into(),
            logged: Vec::new(),
            obs_prefix: "obs_".into(),
            act_prefix: "act_".into(),
        }
    }
}

impl ColumnSpec {
    /// Applies one `ROLE=HEADER` remapping.
    pub fn remap(&mut self, assignment: &str) -> Result<(), String> {
        let (role, header) = assignment
            .split_once('=')
            .ok_or_else(|| format!("'{assignment}' is not of the form ROLE=HEADER"))?;
        let role = Role::parse(role.trim()).ok_or_else(|| {
            let names: Vec<_> = Role::ALL.iter().map(|r| r.key()).collect();
            format!(
                "unknown column role '{role}'; roles are {}",
                names.join(", ")
            )
        })?;
        if header.is_empty() {
            return Err(format!("empty header for role '{}'", role.key()));
        }
        self.headers[role.index()] = header.to_string();
        self.explicit[role.index()] = true;
        Ok(())
    }

    pub fn header(&self, role: Role) -> &str {
        &self.headers[role.index()]
    }
}

/// The resolved layout of one log's header row.
#[derive(Debug, Clone, PartialEq)]
pub struct Schema {
    pub headers: Vec<String>,
    roles: [Option<usize>; 9],
    pub scores: Vec<usize>,
    /// Columns of `ColumnSpec::logged`, in that order.
    pub logged: Vec<usize>,
    pub obs: Vec<usize>,
    pub act: Vec<usize>,
}

/// One line of the "which header got which role" table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Assignment {
    pub role: String,
    /// Headers (one for a scalar role; all, in index order, for a vector role).
    pub headers: Vec<String>,
    /// 1-based column numbers.
    pub columns: Vec<usize>,
}

impl Schema {
    pub fn resolve(spec: &ColumnSpec, headers: Vec<String>, file: &str) -> Result<Schema> {
        let at = |column: Option<(usize, String)>| Position {
            file: file.to_string(),
            line: Some(1),
            column,
        };
        if headers.len() == 1 && headers[0].is_empty() {
            return Err(Error::input(at(None), "the header row is empty"));
        }
        for (i, h) in headers.iter().enumerate() {
            if let Some(j) = headers[..i].iter().position(|g| g == h) {
                return Err(Error::input(
                    at(Some((i + 1, h.clone()))),
                    format!(
                        "header '{h}' appears twice (columns {} and {})",
                        j + 1,
                        i + 1
                    ),
                ));
            }
        }
        let mut roles = [None; 9];
        for role in Role::ALL {
            let wanted = spec.header(role);
            roles[role.index()] = headers.iter().position(|h| h == wanted);
            if roles[role.index()].is_none() && (role.required() || spec.explicit[role.index()]) {
                let hint = match closest(wanted, &headers) {
                    Some(near) => format!(
                        "did you mean '{near}'? If so, pass --col {}={near}",
                        role.key()
                    ),
                    None => format!(
                        "name the column that holds it with --col {}=HEADER",
                        role.key()
                    ),
                };
                return Err(Error::input_hint(
                    at(None),
                    format!(
                        "required column '{wanted}' (role {}) is missing from the header",
                        role.key()
                    ),
                    hint,
                ));
            }
        }
        let scalar: Vec<usize> = roles.iter().flatten().copied().collect();
        let vector = |prefix: &str| -> Result<Vec<usize>> {
            let found: Vec<usize> = (0..headers.len())
                .filter(|i| !scalar.contains(i) && headers[*i].starts_with(prefix))
                .collect();
            order_by_index(&headers, found, prefix, file)
        };
        let logged = resolve_logged(spec, &headers, file)?;
        Ok(Schema {
            logged,
            scores: vector(&spec.score_prefix)?,
            obs: vector(&spec.obs_prefix)?,
            act: vector(&spec.act_prefix)?,
            roles,
            headers,
        })
    }

    pub fn column(&self, role: Role) -> Option<usize> {
        self.roles[role.index()]
    }

    pub fn has(&self, role: Role) -> bool {
        self.column(role).is_some()
    }

    pub fn score_dim(&self) -> usize {
        self.scores.len()
    }

    pub fn assignments(&self) -> Vec<Assignment> {
        let mut out: Vec<Assignment> = Role::ALL
            .iter()
            .filter_map(|&r| {
                self.column(r).map(|c| Assignment {
                    role: r.key().to_string(),
                    headers: vec![self.headers[c].clone()],
                    columns: vec![c + 1],
                })
            })
            .collect();
        for (name, cols) in [
            ("score", &self.scores),
            ("obs", &self.obs),
            ("act", &self.act),
        ] {
            if !cols.is_empty() {
                out.push(Assignment {
                    role: name.to_string(),
                    headers: cols.iter().map(|&c| self.headers[c].clone()).collect(),
                    columns: cols.iter().map(|&c| c + 1).collect(),
                });
            }
        }
        out
    }
}

/// The columns of the logged headers the user asked for: each must exist (with a suggestion
/// when it does not).
fn resolve_logged(spec: &ColumnSpec, headers: &[String], file: &str) -> Result<Vec<usize>> {
    spec.logged
        .iter()
        .map(|wanted| {
            headers.iter().position(|h| h == wanted).ok_or_else(|| {
                let hint = match closest(wanted, headers) {
                    Some(near) => format!("did you mean '{near}'?"),
                    None => format!("the header row has: {}", headers.join(", ")),
                };
                Error::input_hint(
                    Position {
                        file: file.to_string(),
                        line: Some(1),
                        column: None,
                    },
                    format!("logged column '{wanted}' is missing from the header"),
                    hint,
                )
            })
        })
        .collect()
}

/// Orders prefixed columns by their numeric suffix (`score_10` after `score_9`); if any suffix
/// is not a number the file order is kept.
fn order_by_index(
    headers: &[String],
    mut found: Vec<usize>,
    prefix: &str,
    file: &str,
) -> Result<Vec<usize>> {
    let suffixes: Option<Vec<u64>> = found
        .iter()
        .map(|&i| headers[i][prefix.len()..].parse().ok())
        .collect();
    if let Some(suffixes) = suffixes {
        let mut pairs: Vec<(u64, usize)> =
            suffixes.into_iter().zip(found.iter().copied()).collect();
        pairs.sort();
        for w in pairs.windows(2) {
            if w[0].0 == w[1].0 {
                return Err(Error::input(
                    Position {
                        file: file.to_string(),
                        line: Some(1),
                        column: Some((w[1].1 + 1, headers[w[1].1].clone())),
                    },
                    format!(
                        "columns '{}' and '{}' have the same index {}",
                        headers[w[0].1], headers[w[1].1], w[0].0
                    ),
                ));
            }
        }
        found = pairs.into_iter().map(|(_, i)| i).collect();
    }
    Ok(found)
}

/// The header closest to `wanted` by edit distance, if it is plausibly a misspelling.
fn closest<'a>(wanted: &str, headers: &'a [String]) -> Option<&'a str> {
    let wanted_l = wanted.to_lowercase();
    headers
        .iter()
        .map(|h| {
            (
                strsim::normalized_levenshtein(&wanted_l, &h.to_lowercase()),
                h,
            )
        })
        .filter(|(score, h)| *score >= 0.5 || h.to_lowercase().contains(&wanted_l))
        .max_by(|a, b| a.0.total_cmp(&b.0))
        .map(|(_, h)| h.as_str())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn hs(list: &[&str]) -> Vec<String> {
        list.iter().map(|s| s.to_string()).collect()
    }

    #[test]
    fn scores_are_ordered_by_numeric_suffix() {
        let s = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode", "reward", "score_10", "score_2", "score_0"]),
            "f",
        )
        .unwrap();
        assert_eq!(s.scores, vec![4, 3, 2]);
    }

    #[test]
    fn missing_reward_suggests_near_header() {
        let e = Schema::resolve(&ColumnSpec::default(), hs(&["episode", "rewards"]), "f.csv")
            .unwrap_err()
            .to_string();
        assert!(e.contains("'reward'"), "{e}");
        assert!(e.contains("did you mean 'rewards'"), "{e}");
        assert!(e.contains("--col reward=rewards"), "{e}");
    }

    #[test]
    fn remap_and_explicit_missing() {
        let mut spec = ColumnSpec::default();
        spec.remap("reward=r").unwrap();
        spec.remap("value=v_hat").unwrap();
        assert!(spec.remap("bogus=x").is_err());
        assert!(spec.remap("reward").is_err());
        let e = Schema::resolve(&spec, hs(&["episode", "r"]), "f").unwrap_err();
        assert!(e.to_string().contains("'v_hat'"));
    }

    #[test]
    fn duplicate_header_is_an_error() {
        let e = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode", "reward", "reward"]),
            "f",
        )
        .unwrap_err()
        .to_string();
        assert!(e.contains("column 3"), "{e}");
    }
}
