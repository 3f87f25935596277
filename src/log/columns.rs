//! Column roles: which header of a log plays which part (episode id, reward, score vector...),
//! with the user's remappings, and a suggestion when a required header is missing.

use crate::error::{Error, Position, Result};
use serde::Serialize;

/// A single-column role. Vector roles (score, obs, act, next_obs) are found by header prefix
/// instead.
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
    /// The episode ended for any reason (the older convention): with a truncation flag,
    /// terminated = done and not truncated.
    Done,
}

/// Number of single-column roles.
const ROLES: usize = 10;

impl Role {
    pub const ALL: [Role; ROLES] = [
        Role::Episode,
        Role::Step,
        Role::Reward,
        Role::Terminated,
        Role::Truncated,
        Role::Value,
        Role::NextValue,
        Role::Q,
        Role::Logp,
        Role::Done,
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
            Role::Done => "done",
        }
    }

    /// The headers a role is found under by default, in order of preference: its key, and for
    /// the end flags the names the trade also uses (plural forms of vectorised loggers, the
    /// offline-dataset `terminals` / `timeouts`).
    pub fn defaults(self) -> &'static [&'static str] {
        match self {
            Role::Terminated => &["terminated", "terminals", "terminations"],
            Role::Truncated => &["truncated", "timeouts", "truncations"],
            Role::Done => &["done", "dones"],
            Role::Episode => &["episode", "episode_id"],
            Role::Step => &["step"],
            Role::Reward => &["reward", "rewards"],
            Role::Value => &["value"],
            Role::NextValue => &["next_value"],
            Role::Q => &["q"],
            Role::Logp => &["logp"],
        }
    }

    pub fn required(self) -> bool {
        matches!(self, Role::Episode | Role::Reward)
    }

    /// Roles whose default headers are read only when exactly one of them is in the log: a
    /// log with both `reward` and `rewards` (or `episode` and `episode_id`) may mean either,
    /// and reading the wrong one would give a plausible, wrong audit. (The end flags keep
    /// their order of preference.)
    fn one_candidate(self) -> bool {
        matches!(self, Role::Episode | Role::Reward)
    }

    fn index(self) -> usize {
        self as usize
    }

    pub fn parse(key: &str) -> Option<Role> {
        Role::ALL.into_iter().find(|r| r.key() == key)
    }
}

/// The vector roles, found by a header prefix followed by an index, or (Parquet and Arrow)
/// as one list column named by `--col score=NAME` (default name: the role's key).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum VectorRole {
    Score,
    Obs,
    Act,
    /// The observation after the step (the state s_{t+1} the environment returned), which a
    /// value network reads for the bootstrap value of a truncated episode.
    NextObs,
}

/// Number of vector roles.
const VECTOR_ROLES: usize = 4;

impl VectorRole {
    pub const ALL: [VectorRole; VECTOR_ROLES] = [
        VectorRole::Score,
        VectorRole::Obs,
        VectorRole::Act,
        VectorRole::NextObs,
    ];

    pub fn key(self) -> &'static str {
        match self {
            VectorRole::Score => "score",
            VectorRole::Obs => "obs",
            VectorRole::Act => "act",
            VectorRole::NextObs => "next_obs",
        }
    }

    /// The option naming the role's CSV header prefix.
    fn prefix_flag(self) -> &'static str {
        match self {
            VectorRole::Score => "--score-prefix",
            VectorRole::Obs => "--obs-prefix",
            VectorRole::Act => "--act-prefix",
            VectorRole::NextObs => "--next-obs-prefix",
        }
    }
}

/// Names a next-observation list column is found under without `--col next_obs=NAME`, after
/// `next_obs` itself: the plural and singular forms of offline datasets, and the dotted form
/// of robot datasets. `next.NAME` and `next_NAME` for an obs list column `NAME` are tried too.
const NEXT_OBS_LISTS: [&str; 4] = [
    "next_observations",
    "next_observation",
    "next.observation",
    "next.observation.state",
];

/// What the user asked for: a header per role and a prefix per vector role.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ColumnSpec {
    headers: [String; ROLES],
    /// Roles the user named explicitly; a missing explicit header is an error even if optional.
    explicit: [bool; ROLES],
    pub score_prefix: String,
    /// Headers of per-step columns carried into each episode as they are (`Episode::logged`):
    /// a training stack's own advantages or value targets, to check or to audit.
    pub logged: Vec<String>,
    pub obs_prefix: String,
    pub act_prefix: String,
    /// Header prefix of the next-observation columns; None: `next_` and the obs prefix
    /// (`next_obs_0`, `next_obs_1`, ... by default).
    pub next_obs_prefix: Option<String>,
    /// List columns named for the vector roles (`--col obs=robot.state`), by [`VectorRole`].
    pub lists: [Option<String>; VECTOR_ROLES],
    /// The environment column of a vector-environment layout (`--env-col`): episode ids are
    /// then derived from runs within each environment instead of read.
    pub env: Option<String>,
}

impl Default for ColumnSpec {
    fn default() -> Self {
        ColumnSpec {
            headers: Role::ALL.map(|r| r.key().to_string()),
            explicit: [false; ROLES],
            score_prefix: "score_".into(),
            logged: Vec::new(),
            obs_prefix: "obs_".into(),
            act_prefix: "act_".into(),
            next_obs_prefix: None,
            lists: [None, None, None, None],
            env: None,
        }
    }
}

impl ColumnSpec {
    /// Applies one `ROLE=HEADER` remapping.
    pub fn remap(&mut self, assignment: &str) -> Result<(), String> {
        let (role, header) = assignment
            .split_once('=')
            .ok_or_else(|| format!("'{assignment}' is not of the form ROLE=HEADER"))?;
        if header.is_empty() {
            return Err(format!("empty header for role '{}'", role.trim()));
        }
        if let Some(v) = VectorRole::ALL.iter().position(|v| v.key() == role.trim()) {
            self.lists[v] = Some(header.to_string());
            return Ok(());
        }
        let role = Role::parse(role.trim()).ok_or_else(|| {
            let names: Vec<_> = Role::ALL.iter().map(|r| r.key()).collect();
            format!(
                "unknown column role '{role}'; roles are {} (and score, obs, act, next_obs for \
                 a list column of a Parquet or Arrow file)",
                names.join(", ")
            )
        })?;
        self.headers[role.index()] = header.to_string();
        self.explicit[role.index()] = true;
        Ok(())
    }

    pub fn header(&self, role: Role) -> &str {
        &self.headers[role.index()]
    }

    /// The CSV header prefix of vector role `v`.
    fn prefix(&self, v: VectorRole) -> String {
        match v {
            VectorRole::Score => self.score_prefix.clone(),
            VectorRole::Obs => self.obs_prefix.clone(),
            VectorRole::Act => self.act_prefix.clone(),
            VectorRole::NextObs => self
                .next_obs_prefix
                .clone()
                .unwrap_or_else(|| format!("next_{}", self.obs_prefix)),
        }
    }
}

/// How a role's column was found: under its key, under another name the trade uses for it,
/// or named with `--col`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Found {
    Default,
    Synonym,
    Option,
}

/// A list column of a Parquet or Arrow file read as a vector role; its elements appear in
/// [`Schema::headers`] as `name[k]` from index `first` on.
#[derive(Debug, Clone, PartialEq)]
pub struct ListColumn {
    pub role: VectorRole,
    pub column: usize,
    pub width: usize,
    pub first: usize,
}

/// The resolved layout of one log's header row (or a columnar file's top-level fields).
#[derive(Debug, Clone, PartialEq)]
pub struct Schema {
    /// The columns, then the elements of list columns (`name[k]`), which vector roles index.
    pub headers: Vec<String>,
    roles: [Option<usize>; ROLES],
    found: [Found; ROLES],
    pub scores: Vec<usize>,
    /// Columns of `ColumnSpec::logged`, in that order.
    pub logged: Vec<usize>,
    pub obs: Vec<usize>,
    pub act: Vec<usize>,
    /// The observation after each step (as wide as `obs`, element k the next value of obs
    /// element k), empty when the log has none.
    pub next_obs: Vec<usize>,
    /// The environment column (`--env-col`), which then stands in for the episode id.
    pub env: Option<usize>,
    pub lists: Vec<ListColumn>,
    /// Columns of the file ([`Schema::headers`] past them are list elements).
    real: usize,
    /// Why a found end-flag column is not read, if one is not.
    end_note: Option<String>,
}

/// How the end flags were read: the convention's name and the columns that decided it.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct EndFlags {
    pub convention: &'static str,
    pub reason: String,
}

/// One line of the "which header got which role" table.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Assignment {
    pub role: String,
    /// Headers (one for a scalar role; all, in index order, for a vector role).
    pub headers: Vec<String>,
    /// 1-based column numbers.
    pub columns: Vec<usize>,
    /// Elements per row, for a vector role read from one list column.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub list_width: Option<usize>,
    /// How a single-column role was found.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub found: Option<Found>,
}

impl Schema {
    /// A CSV header row's roles.
    pub fn resolve(spec: &ColumnSpec, headers: Vec<String>, file: &str) -> Result<Schema> {
        Self::resolve_with_lists(spec, headers, &[], file)
    }

    /// Roles of columns some of which may be lists of numbers: `widths[c]` is the width of
    /// column c's lists (empty for CSV, where no column is a list).
    pub fn resolve_with_lists(
        spec: &ColumnSpec,
        headers: Vec<String>,
        widths: &[Option<usize>],
        file: &str,
    ) -> Result<Schema> {
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
        let (roles, found, end_note) = resolve_roles(spec, &headers, file)?;
        let env = match &spec.env {
            Some(name) => Some(find_required(
                name,
                "--env-col",
                &headers,
                file,
                "--env-col",
            )?),
            None => None,
        };
        let logged = resolve_logged(spec, &headers, file)?;
        let mut schema = Schema {
            logged,
            real: headers.len(),
            headers,
            roles,
            found,
            scores: Vec::new(),
            obs: Vec::new(),
            act: Vec::new(),
            next_obs: Vec::new(),
            env,
            lists: Vec::new(),
            end_note,
        };
        for v in VectorRole::ALL {
            let cols = schema.vector_columns(spec, v, widths, file)?;
            match v {
                VectorRole::Score => schema.scores = cols,
                VectorRole::Obs => schema.obs = cols,
                VectorRole::Act => schema.act = cols,
                VectorRole::NextObs => schema.next_obs = cols,
            }
        }
        schema.check_next_obs(spec, file)?;
        Ok(schema)
    }

    /// The next observation must be as wide as the observation, element for element: prefixed
    /// columns of both carry the same indices (`obs_3` and `next_obs_3`).
    fn check_next_obs(&self, spec: &ColumnSpec, file: &str) -> Result<()> {
        if self.next_obs.is_empty() {
            return Ok(());
        }
        let listed = |v: VectorRole| self.lists.iter().any(|l| l.role == v);
        let (po, pn) = (
            spec.prefix(VectorRole::Obs).len(),
            spec.prefix(VectorRole::NextObs).len(),
        );
        let same = self.next_obs.len() == self.obs.len()
            && (listed(VectorRole::Obs)
                || listed(VectorRole::NextObs)
                || self
                    .obs
                    .iter()
                    .zip(&self.next_obs)
                    .all(|(&o, &n)| self.headers[o][po..] == self.headers[n][pn..]));
        if same {
            return Ok(());
        }
        let span = |cols: &[usize]| match cols {
            [] => "none".to_string(),
            [c] => format!("'{}'", self.headers[*c]),
            [a, .., b] => format!(
                "'{}' .. '{}', {} values",
                self.headers[*a],
                self.headers[*b],
                cols.len()
            ),
        };
        let c = self.file_column(self.next_obs[0]);
        Err(Error::input_hint(
            Position {
                file: file.to_string(),
                line: Some(1),
                column: Some((c + 1, self.headers[c].clone())),
            },
            format!(
                "the next-observation columns ({}) do not match the obs columns ({}) element \
                 for element",
                span(&self.next_obs),
                span(&self.obs)
            ),
            "the next observation is the obs vector one step later: log the same elements, or \
             name the columns with --col next_obs=NAME or --next-obs-prefix, and --col obs=NAME \
             or --obs-prefix",
        ))
    }

    /// The file column of a header index: a list element's list column, else itself.
    fn file_column(&self, c: usize) -> usize {
        self.lists
            .iter()
            .find(|l| (l.first..l.first + l.width).contains(&c))
            .map_or(c, |l| l.column)
    }

    /// A vector role's columns: one list column (Parquet, Arrow) or prefixed columns.
    fn vector_columns(
        &mut self,
        spec: &ColumnSpec,
        v: VectorRole,
        widths: &[Option<usize>],
        file: &str,
    ) -> Result<Vec<usize>> {
        let prefix = &spec.prefix(v);
        let explicit = spec.lists[v as usize].as_deref();
        let default = match v {
            VectorRole::NextObs => self.next_obs_list(widths),
            VectorRole::Obs | VectorRole::Act => self.plural_list(v, prefix, widths),
            VectorRole::Score => v.key().to_string(),
        };
        let name = explicit.unwrap_or(&default);
        let at = |c: Option<usize>| Position {
            file: file.to_string(),
            line: Some(1),
            column: c.map(|c| (c + 1, self.headers[c].clone())),
        };
        let list = self.headers[..self.real].iter().position(|h| h == name);
        let list = match (list, explicit) {
            (_, Some(_)) if widths.is_empty() => {
                return Err(Error::input_hint(
                    at(None),
                    format!("--col {}={name}: a CSV log has no list columns", v.key()),
                    format!(
                        "in CSV give one column per element and name their prefix with {}",
                        v.prefix_flag()
                    ),
                ));
            }
            (None, Some(_)) => {
                find_required(name, v.key(), &self.headers[..self.real], file, "--col")?;
                None
            }
            (Some(c), _) if widths.get(c).copied().flatten().is_some() => Some(c),
            (Some(c), Some(_)) => {
                return Err(Error::input(
                    at(Some(c)),
                    format!(
                        "--col {}={name}: this column is not a list of numbers",
                        v.key()
                    ),
                ));
            }
            (Some(_), None) | (None, None) => None,
        };
        let scalar: Vec<usize> = self
            .roles
            .iter()
            .flatten()
            .chain(&self.env)
            .copied()
            .collect();
        let found: Vec<usize> = (0..self.real)
            .filter(|i| !scalar.contains(i) && self.headers[*i].starts_with(prefix.as_str()))
            .collect();
        let Some(c) = list else {
            return order_by_index(&self.headers, found, prefix, file);
        };
        if let Some(&p) = found.first() {
            return Err(Error::input_hint(
                at(Some(p)),
                format!(
                    "role {} has both a list column '{name}' and columns named '{prefix}...'",
                    v.key()
                ),
                format!(
                    "name the one to read: --col {}={name}, or {} for the others",
                    v.key(),
                    v.prefix_flag()
                ),
            ));
        }
        self.add_list(v, c, widths[c].expect("a list column"), file)
    }

    /// The name a next-observation list column is looked for under: the first of `next_obs`,
    /// [`NEXT_OBS_LISTS`], `next.NAME` and `next_NAME` (for an obs list column NAME) that is a
    /// list column of the file, else `next_obs`.
    fn next_obs_list(&self, widths: &[Option<usize>]) -> String {
        let obs = self
            .lists
            .iter()
            .find(|l| l.role == VectorRole::Obs)
            .map(|l| self.headers[l.column].clone());
        let mut names: Vec<String> = std::iter::once("next_obs")
            .chain(NEXT_OBS_LISTS)
            .map(String::from)
            .collect();
        if let Some(o) = obs {
            names.extend([format!("next.{o}"), format!("next_{o}")]);
        }
        let is_list = |n: &String| {
            self.headers[..self.real]
                .iter()
                .position(|h| h == n)
                .is_some_and(|c| widths.get(c).copied().flatten().is_some())
        };
        names
            .iter()
            .find(|n| is_list(n))
            .unwrap_or(&names[0])
            .clone()
    }

    /// The list column obs or act is read from by default: its key, or the plural offline
    /// datasets write (`observations`, `actions`) when that is a list column and no header
    /// starts with the role's prefix (so a log that names both keeps reading its columns).
    fn plural_list(&self, v: VectorRole, prefix: &str, widths: &[Option<usize>]) -> String {
        let plural = match v {
            VectorRole::Obs => "observations",
            _ => "actions",
        };
        let key = v.key();
        let list_at = |n: &str| {
            self.headers[..self.real]
                .iter()
                .position(|h| h == n)
                .is_some_and(|c| widths.get(c).copied().flatten().is_some())
        };
        let prefixed = self.headers[..self.real]
            .iter()
            .any(|h| h.starts_with(prefix));
        if !list_at(key) && list_at(plural) && !prefixed {
            plural.to_string()
        } else {
            key.to_string()
        }
    }

    /// Adds list column `c` (lists of `width` numbers) as vector role `v`: its elements
    /// become columns `name[k]` past the file's.
    fn add_list(
        &mut self,
        v: VectorRole,
        c: usize,
        width: usize,
        file: &str,
    ) -> Result<Vec<usize>> {
        let first = self.headers.len();
        if first.saturating_add(width) > crate::limits::MAX_COLUMNS {
            return Err(Error::input(
                Position {
                    file: file.to_string(),
                    line: Some(1),
                    column: Some((c + 1, self.headers[c].clone())),
                },
                format!(
                    "lists of {width} numbers: more than the limit of {} columns",
                    crate::limits::MAX_COLUMNS
                ),
            ));
        }
        let name = self.headers[c].clone();
        self.headers
            .extend((0..width).map(|k| format!("{name}[{k}]")));
        self.lists.push(ListColumn {
            role: v,
            column: c,
            width,
            first,
        });
        Ok((first..first + width).collect())
    }

    pub fn column(&self, role: Role) -> Option<usize> {
        self.roles[role.index()]
    }

    pub fn has(&self, role: Role) -> bool {
        self.column(role).is_some()
    }

    /// The column episode ids are read from: the environment column in a vector-environment
    /// layout, else the episode column.
    pub fn id_column(&self) -> usize {
        self.env
            .or(self.column(Role::Episode))
            .expect("resolve requires an episode or environment column")
    }

    /// Columns of the file itself (list elements excluded).
    pub fn file_columns(&self) -> usize {
        self.real
    }

    pub fn score_dim(&self) -> usize {
        self.scores.len()
    }

    /// Whether rows carry any end flag.
    pub fn has_end_flags(&self) -> bool {
        self.has(Role::Terminated) || self.has(Role::Truncated) || self.has(Role::Done)
    }

    /// The end-flag convention and the columns that decided it, in words.
    pub fn end_flags(&self) -> EndFlags {
        let desc = |r: Role| {
            self.column(r).map(|c| {
                let how = match self.found[r.index()] {
                    Found::Default => "",
                    Found::Synonym => " (a name the trade uses for it)",
                    Found::Option => " (named with --col)",
                };
                format!("'{}' read as {}{how}", self.headers[c], r.key())
            })
        };
        let (done, term, trunc) = (
            desc(Role::Done),
            desc(Role::Terminated),
            desc(Role::Truncated),
        );
        let (convention, mut reason) = match (done, term, trunc) {
            (Some(d), _, Some(t)) => (
                "done+truncated",
                format!(
                    "{d}, {t}: an end is terminal when done is set and truncated is not, a \
                     time-limit cut when truncated is set"
                ),
            ),
            (Some(d), _, None) => (
                "done",
                format!("{d} and no truncation flag: every end is taken as terminal"),
            ),
            (None, Some(a), Some(t)) => (
                "terminated+truncated",
                format!("{a}, {t}: an end flagged both ways is taken as terminal"),
            ),
            (None, Some(a), None) => (
                "terminated",
                format!("{a} and no truncation flag: every flagged end is terminal"),
            ),
            (None, None, Some(t)) => (
                "truncated",
                format!("{t} and no terminal flag: every flagged end is a time-limit cut"),
            ),
            (None, None, None) => (
                "none",
                "no end-flag column: each episode ends at its last row, taken as terminated"
                    .to_string(),
            ),
        };
        if let Some(note) = &self.end_note {
            reason = format!("{reason}; {note}");
        }
        EndFlags { convention, reason }
    }

    pub fn assignments(&self) -> Vec<Assignment> {
        let one = |role: &str, c: usize, found: Option<Found>| Assignment {
            role: role.to_string(),
            headers: vec![self.headers[c].clone()],
            columns: vec![c + 1],
            list_width: None,
            found,
        };
        let mut out: Vec<Assignment> = Role::ALL
            .iter()
            .filter_map(|&r| {
                self.column(r)
                    .map(|c| one(r.key(), c, Some(self.found[r.index()])))
            })
            .collect();
        if let Some(c) = self.env {
            out.push(one("env", c, Some(Found::Option)));
        }
        for (v, cols) in [
            (VectorRole::Score, &self.scores),
            (VectorRole::Obs, &self.obs),
            (VectorRole::Act, &self.act),
            (VectorRole::NextObs, &self.next_obs),
        ] {
            if let Some(l) = self.lists.iter().find(|l| l.role == v) {
                let mut a = one(v.key(), l.column, None);
                a.list_width = Some(l.width);
                out.push(a);
            } else if !cols.is_empty() {
                out.push(Assignment {
                    role: v.key().to_string(),
                    headers: cols.iter().map(|&c| self.headers[c].clone()).collect(),
                    columns: cols.iter().map(|&c| c + 1).collect(),
                    list_width: None,
                    found: None,
                });
            }
        }
        out
    }
}

type Roles = ([Option<usize>; ROLES], [Found; ROLES], Option<String>);

/// Each single-column role's column: the one named with `--col`, else the first of its
/// default names present. A done column is read only without a terminated column (or when
/// named), since terminated = done and not truncated.
fn resolve_roles(spec: &ColumnSpec, headers: &[String], file: &str) -> Result<Roles> {
    let mut roles = [None; ROLES];
    let mut found = [Found::Default; ROLES];
    for role in Role::ALL {
        let i = role.index();
        if spec.explicit[i] {
            let flag = format!("--col {}", role.key());
            roles[i] = Some(find_required(
                spec.header(role),
                role.key(),
                headers,
                file,
                &flag,
            )?);
            found[i] = Found::Option;
            continue;
        }
        // Default headers present and not named for another role with --col.
        let hits: Vec<(usize, usize)> = role
            .defaults()
            .iter()
            .enumerate()
            .filter(|(_, name)| {
                !Role::ALL
                    .iter()
                    .any(|&o| spec.explicit[o.index()] && spec.header(o) == **name)
            })
            .filter_map(|(k, name)| headers.iter().position(|h| h == name).map(|p| (k, p)))
            .collect();
        let ids_derived = role == Role::Episode && spec.env.is_some();
        if role.one_candidate() && hits.len() > 1 && !ids_derived {
            return Err(two_candidates(role, &hits, headers, file));
        }
        if let Some(&(k, p)) = hits.first() {
            roles[i] = Some(p);
            found[i] = if k == 0 {
                Found::Default
            } else {
                Found::Synonym
            };
        } else if role.required() && !(role == Role::Episode && spec.env.is_some()) {
            let flag = format!("--col {}", role.key());
            find_required(role.key(), role.key(), headers, file, &flag)?;
        }
    }
    if spec.env.is_some() {
        // Ids are derived from the environment column: an episode column is not read.
        roles[Role::Episode.index()] = None;
    }
    // A column found by default that another role was given explicitly is not read twice.
    for r in Role::ALL {
        let taken = Role::ALL
            .iter()
            .any(|&o| o != r && spec.explicit[o.index()] && roles[o.index()] == roles[r.index()]);
        if taken && !spec.explicit[r.index()] {
            roles[r.index()] = None;
        }
    }
    let (d, t) = (Role::Done.index(), Role::Terminated.index());
    let mut note = None;
    if let (Some(dc), Some(tc)) = (roles[d], roles[t]) {
        match (spec.explicit[d], spec.explicit[t]) {
            (true, true) => {
                return Err(Error::input_hint(
                    Position {
                        file: file.to_string(),
                        line: Some(1),
                        column: None,
                    },
                    "both a done and a terminated column were named",
                    "terminated = done and not truncated: name one of them",
                ));
            }
            (true, false) => {
                note = Some(format!(
                    "'{}' not read (--col done given, and terminated = done and not truncated)",
                    headers[tc]
                ));
                roles[t] = None;
            }
            (false, _) => {
                note = Some(format!(
                    "'{}' not read as done (the log has a terminated column)",
                    headers[dc]
                ));
                roles[d] = None;
            }
        }
    }
    Ok((roles, found, note))
}

/// A log with two default headers for one role (`reward` and `rewards`): which to read is
/// the user's call.
fn two_candidates(role: Role, hits: &[(usize, usize)], headers: &[String], file: &str) -> Error {
    let named: Vec<String> = hits
        .iter()
        .map(|&(_, p)| format!("'{}' (column {})", headers[p], p + 1))
        .collect();
    let options: Vec<String> = hits
        .iter()
        .map(|&(_, p)| format!("--col {}={}", role.key(), headers[p]))
        .collect();
    Error::input_hint(
        Position {
            file: file.to_string(),
            line: Some(1),
            column: None,
        },
        format!(
            "the log has {} for role {}: either could be it, so neither is read by default",
            named.join(" and "),
            role.key()
        ),
        format!("name the one to read: {}", options.join(" or ")),
    )
}

/// The column named `wanted` (for `role`), or an error with the nearest header suggested.
fn find_required(
    wanted: &str,
    role: &str,
    headers: &[String],
    file: &str,
    flag: &str,
) -> Result<usize> {
    if let Some(p) = headers.iter().position(|h| h == wanted) {
        return Ok(p);
    }
    let hint = match closest(wanted, headers) {
        Some(near) if flag == "--env-col" => {
            format!("did you mean '{near}'? If so, pass --env-col {near}")
        }
        Some(near) => format!("did you mean '{near}'? If so, pass {flag}={near}"),
        None if flag == "--env-col" => "name the column that holds it with --env-col HEADER".into(),
        None => format!("name the column that holds it with {flag}=HEADER"),
    };
    let what = if flag == "--env-col" {
        "environment".to_string()
    } else {
        role.to_string()
    };
    Err(Error::input_hint(
        Position {
            file: file.to_string(),
            line: Some(1),
            column: None,
        },
        format!("required column '{wanted}' (role {what}) is missing from the header"),
        hint,
    ))
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

    // `rewards` became a default header of the reward role, so the near miss is `rewrd`.
    #[test]
    fn missing_reward_suggests_near_header() {
        let e = Schema::resolve(&ColumnSpec::default(), hs(&["episode", "rewrd"]), "f.csv")
            .unwrap_err()
            .to_string();
        assert!(e.contains("'reward'"), "{e}");
        assert!(e.contains("did you mean 'rewrd'"), "{e}");
        assert!(e.contains("--col reward=rewrd"), "{e}");
    }

    #[test]
    fn rewards_and_episode_id_are_read_when_they_are_the_only_candidates() {
        let s = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode_id", "step", "rewards"]),
            "f.csv",
        )
        .unwrap();
        assert_eq!(s.column(Role::Episode), Some(0));
        assert_eq!(s.column(Role::Reward), Some(2));
        let reward = s
            .assignments()
            .into_iter()
            .find(|a| a.role == "reward")
            .unwrap();
        assert_eq!(reward.found, Some(Found::Synonym));
        // The key wins nothing: with both, neither is read.
        let e = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode", "reward", "rewards"]),
            "f.csv",
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("'reward' (column 2) and 'rewards' (column 3) for role reward")
                && e.contains("--col reward=reward or --col reward=rewards"),
            "{e}"
        );
        let e = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode_id", "episode", "reward"]),
            "f.csv",
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("'episode' (column 2) and 'episode_id' (column 1) for role episode"),
            "{e}"
        );
        // Naming one resolves it; so does giving the other to another role, or --env-col.
        let mut spec = ColumnSpec::default();
        spec.remap("reward=rewards").unwrap();
        let s = Schema::resolve(&spec, hs(&["episode", "reward", "rewards"]), "f").unwrap();
        assert_eq!(s.column(Role::Reward), Some(2));
        let mut spec = ColumnSpec::default();
        spec.remap("value=rewards").unwrap();
        let s = Schema::resolve(&spec, hs(&["episode", "reward", "rewards"]), "f").unwrap();
        assert_eq!(
            (s.column(Role::Reward), s.column(Role::Value)),
            (Some(1), Some(2))
        );
        let spec = ColumnSpec {
            env: Some("env".into()),
            ..ColumnSpec::default()
        };
        let h = hs(&["env", "episode", "episode_id", "reward", "done"]);
        assert!(Schema::resolve(&spec, h, "f").is_ok());
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

    // The trade's names for the end flags are found by default and reported as such; a done
    // column is read only without a terminated column, unless named.
    #[test]
    fn end_flag_synonyms_and_the_done_convention() {
        let s = Schema::resolve(
            &ColumnSpec::default(),
            hs(&["episode", "reward", "dones", "timeouts"]),
            "f",
        )
        .unwrap();
        assert_eq!(
            (s.column(Role::Done), s.column(Role::Truncated)),
            (Some(2), Some(3))
        );
        assert_eq!(s.column(Role::Terminated), None);
        let e = s.end_flags();
        assert_eq!(e.convention, "done+truncated");
        assert!(
            e.reason
                .contains("'timeouts' read as truncated (a name the trade"),
            "{e:?}"
        );
        let both = hs(&["episode", "reward", "done", "terminated", "truncated"]);
        let s = Schema::resolve(&ColumnSpec::default(), both.clone(), "f").unwrap();
        assert_eq!(
            (s.column(Role::Done), s.column(Role::Terminated)),
            (None, Some(3))
        );
        assert!(s.end_flags().reason.contains("'done' not read as done"));
        let mut spec = ColumnSpec::default();
        spec.remap("done=done").unwrap();
        let s = Schema::resolve(&spec, both.clone(), "f").unwrap();
        assert_eq!(
            (s.column(Role::Done), s.column(Role::Terminated)),
            (Some(2), None)
        );
        spec.remap("terminated=terminated").unwrap();
        assert!(Schema::resolve(&spec, both, "f").is_err());
    }

    // The next observation: prefixed columns after `next_` and the obs prefix, list columns
    // under the trade's names or `next.NAME` for an obs list NAME, and a width check.
    #[test]
    fn next_observation_columns_and_lists() {
        let h = hs(&[
            "episode",
            "reward",
            "obs_0",
            "obs_1",
            "next_obs_1",
            "next_obs_0",
        ]);
        let s = Schema::resolve(&ColumnSpec::default(), h, "f").unwrap();
        assert_eq!(
            (s.obs.clone(), s.next_obs.clone()),
            (vec![2, 3], vec![5, 4])
        );
        let spec = ColumnSpec {
            obs_prefix: "x".into(),
            ..ColumnSpec::default()
        };
        let s = Schema::resolve(&spec, hs(&["episode", "reward", "x0", "next_x0"]), "f").unwrap();
        assert_eq!(s.next_obs, vec![3]);
        let h = hs(&[
            "episode",
            "reward",
            "obs_0",
            "obs_1",
            "next_obs_0",
            "next_obs_2",
        ]);
        let e = Schema::resolve(&ColumnSpec::default(), h, "f.csv").unwrap_err();
        assert!(e.to_string().contains("column 5 ('next_obs_0')"), "{e}");
        let mut spec = ColumnSpec::default();
        spec.remap("obs=observation.state").unwrap();
        let h = hs(&[
            "episode",
            "reward",
            "observation.state",
            "next.observation.state",
        ]);
        let s = Schema::resolve_with_lists(&spec, h.clone(), &[None, None, Some(2), Some(2)], "f")
            .unwrap();
        assert_eq!(s.next_obs, vec![6, 7]);
        assert_eq!(s.headers[7], "next.observation.state[1]");
        let e = Schema::resolve_with_lists(&spec, h, &[None, None, Some(2), Some(3)], "f.parquet")
            .unwrap_err()
            .to_string();
        assert!(e.contains("column 4 ('next.observation.state')"), "{e}");
        let h = hs(&["episode", "reward", "obs", "next_observations"]);
        let s = Schema::resolve_with_lists(
            &ColumnSpec::default(),
            h,
            &[None, None, Some(3), Some(3)],
            "f",
        )
        .unwrap();
        assert_eq!(s.next_obs.len(), 3);
        // Offline datasets' plural list names, unless prefixed columns are there too.
        let h = hs(&[
            "episode",
            "reward",
            "observations",
            "actions",
            "next_observations",
        ]);
        let w = [None, None, Some(3), Some(2), Some(3)];
        let s = Schema::resolve_with_lists(&ColumnSpec::default(), h, &w, "f").unwrap();
        assert_eq!((s.obs.len(), s.act.len(), s.next_obs.len()), (3, 2, 3));
        let h = hs(&["episode", "reward", "observations", "act_0"]);
        let w = [None, None, Some(3), None];
        let s = Schema::resolve_with_lists(&ColumnSpec::default(), h, &w, "f").unwrap();
        assert_eq!((s.obs.len(), s.act.clone()), (3, vec![3]));
    }

    #[test]
    fn env_column_replaces_the_episode_id_and_lists_need_a_columnar_file() {
        let spec = ColumnSpec {
            env: Some("env".into()),
            ..ColumnSpec::default()
        };
        let s = Schema::resolve(&spec, hs(&["env", "reward", "done"]), "f").unwrap();
        assert_eq!((s.id_column(), s.column(Role::Episode)), (0, None));
        let e = Schema::resolve(&spec, hs(&["envs", "reward"]), "f").unwrap_err();
        assert!(e.to_string().contains("did you mean 'envs'"), "{e}");
        let mut spec = ColumnSpec::default();
        spec.remap("obs=robot.state").unwrap();
        let h = hs(&["episode", "reward", "robot.state"]);
        let e = Schema::resolve(&spec, h.clone(), "f")
            .unwrap_err()
            .to_string();
        assert!(e.contains("a CSV log has no list columns"), "{e}");
        let s = Schema::resolve_with_lists(&spec, h, &[None, None, Some(3)], "f").unwrap();
        assert_eq!(s.obs, vec![3, 4, 5]);
        assert_eq!(s.headers[5], "robot.state[2]");
        assert_eq!(s.file_columns(), 3);
    }
}
