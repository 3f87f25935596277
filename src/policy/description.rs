//! The policy description file (`gradaudit.policy/1`, JSON): the fields every family shares
//! (`schema`, `family`, `features`, `note`), how its column names bind to the log's header,
//! and the messages for a bad file. Each family's own fields are read by linear.rs or
//! spec.rs, which parse the same text again into their own strict types (so serde's error
//! keeps the line number).

use crate::error::{Error, Position, Result};
use crate::log::Schema;
use serde::Deserialize;
use serde::de::DeserializeOwned;

pub const POLICY_SCHEMA: &str = "gradaudit.policy/1";

pub const FAMILIES: &str = "gaussian_linear, softmax_linear, bernoulli_logistic, mlp";

/// The two fields read before the family is known; everything else is left to the family.
#[derive(Debug, Deserialize)]
struct Header {
    schema: String,
    family: String,
}

/// The description file being read and the log header it binds to.
#[derive(Clone, Copy)]
pub struct Ctx<'a> {
    pub file: &'a str,
    pub schema: &'a Schema,
}

impl Ctx<'_> {
    /// An error about the description as a whole.
    pub fn bad(&self, message: impl Into<String>) -> Error {
        Error::input_hint(
            Position {
                file: self.file.to_string(),
                ..Default::default()
            },
            message,
            "see the README section 'Policy files' for the format",
        )
    }

    /// Parses the description into `T`; a syntax or type error names its line.
    pub fn parse<T: DeserializeOwned>(&self, text: &str) -> Result<T> {
        serde_json::from_str(text).map_err(|e| {
            Error::input_hint(
                Position {
                    file: self.file.to_string(),
                    line: Some(e.line() as u64),
                    column: None,
                },
                format!("invalid policy file: {e}"),
                "see the README section 'Policy files' for the format",
            )
        })
    }

    /// Checks the schema and returns the family name.
    pub fn family(&self, text: &str) -> Result<String> {
        let h: Header = self.parse(text)?;
        if h.schema != POLICY_SCHEMA {
            return Err(self.bad(format!(
                "schema is '{}', expected '{POLICY_SCHEMA}'",
                h.schema
            )));
        }
        Ok(h.family)
    }

    /// Positions within the episode's obs vector of the named obs columns.
    pub fn obs(&self, names: &[String]) -> Result<Vec<usize>> {
        names
            .iter()
            .map(|n| self.find(n, &self.schema.obs, "obs"))
            .collect()
    }

    /// Positions within the episode's act vector of the named act columns.
    pub fn act(&self, names: &[String]) -> Result<Vec<usize>> {
        names
            .iter()
            .map(|n| self.find(n, &self.schema.act, "act"))
            .collect()
    }

    fn find(&self, name: &str, cols: &[usize], kind: &str) -> Result<usize> {
        cols.iter()
            .position(|&c| self.schema.headers[c] == name)
            .ok_or_else(|| {
                let have: Vec<&str> = cols
                    .iter()
                    .map(|&c| self.schema.headers[c].as_str())
                    .collect();
                let have = match have.as_slice() {
                    [] => format!(
                        "it has none: name their header prefix with --{kind}-prefix, or a list \
                         column with --col {kind}=NAME"
                    ),
                    [a, _, _, _, _, _, ..] => {
                        format!(
                            "they are {a} .. {} ({} columns)",
                            have[have.len() - 1],
                            have.len()
                        )
                    }
                    _ => format!("they are {}", have.join(", ")),
                };
                self.bad(format!(
                    "{kind} column '{name}' named by the policy is not among the log's {kind} \
                     columns ({have})"
                ))
            })
    }

    pub fn finite(&self, xs: &[f64], what: &str) -> Result<()> {
        if xs.iter().all(|x| x.is_finite()) {
            Ok(())
        } else {
            Err(self.bad(format!("{what} holds a non-finite number")))
        }
    }
}
