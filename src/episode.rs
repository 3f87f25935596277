//! The episode model: one finished trajectory with its per-step arrays and how it ended, and
//! its id (raw bytes as logged, plus a UTF-8 rendering for messages).

/// How an episode ended, which decides the value after its last step (V_T).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum End {
    /// An absorbing state was reached: V_T = 0.
    Terminated,
    /// Cut by a time limit or by the end of the log. `bootstrap` is V(s_T) from the last row's
    /// next_value; when absent the tail value is taken as 0 (and a warning is counted).
    Truncated { bootstrap: Option<f64> },
}

/// One finished episode. Per-step vectors are stored row-major (`T x dim`).
#[derive(Debug, Clone, PartialEq)]
pub struct Episode {
    /// The id for messages: the log's bytes decoded as UTF-8 (invalid sequences replaced).
    pub id: String,
    /// The id's bytes exactly as in the log: what identifies, orders and folds the episode
    /// (two ids may decode to the same `id`, e.g. different invalid UTF-8 bytes).
    pub key: Vec<u8>,
    /// Line of its first row in the log, for messages.
    pub first_line: u64,
    /// Line of each step's row in the log, for messages about one step (empty for episodes
    /// built in memory).
    pub lines: Vec<u64>,
    /// Logged per-step columns asked for by name (`ColumnSpec::logged`), row-major
    /// (`T x logged_names.len()`): a training stack's own advantages or value targets.
    pub logged: Vec<f64>,
    /// The headers of the logged columns, in the order of `logged`'s rows.
    pub logged_names: std::sync::Arc<[String]>,
    pub rewards: Vec<f64>,
    pub values: Option<Vec<f64>>,
    pub q: Option<Vec<f64>>,
    pub logp: Option<Vec<f64>>,
    pub score_dim: usize,
    pub scores: Vec<f64>,
    pub obs_dim: usize,
    pub obs: Vec<f64>,
    pub act_dim: usize,
    pub act: Vec<f64>,
    pub end: End,
    /// The environment of a vector-environment layout (`--env-col`), None otherwise.
    pub env: Option<String>,
}

impl Episode {
    /// An empty episode with the given per-step layout.
    pub fn new(id: String, first_line: u64, layout: &Layout) -> Self {
        let mut ep = Episode::from_raw_id(&[], first_line, layout);
        ep.key = id.clone().into_bytes();
        ep.id = id;
        ep
    }

    /// An empty episode whose id is the raw bytes `raw` of the log's episode field.
    pub fn from_raw_id(raw: &[u8], first_line: u64, layout: &Layout) -> Self {
        Episode {
            id: String::from_utf8_lossy(raw).into_owned(),
            key: raw.to_vec(),
            first_line,
            lines: Vec::new(),
            logged: Vec::new(),
            logged_names: layout.logged.clone(),
            rewards: Vec::new(),
            values: layout.value.then(Vec::new),
            q: layout.q.then(Vec::new),
            logp: layout.logp.then(Vec::new),
            score_dim: layout.score_dim,
            scores: Vec::new(),
            obs_dim: layout.obs_dim,
            obs: Vec::new(),
            act_dim: layout.act_dim,
            act: Vec::new(),
            end: End::Terminated,
            env: None,
        }
    }

    pub fn len(&self) -> usize {
        self.rewards.len()
    }

    pub fn is_empty(&self) -> bool {
        self.rewards.is_empty()
    }

    /// The score vector of step t.
    pub fn score(&self, t: usize) -> &[f64] {
        &self.scores[t * self.score_dim..(t + 1) * self.score_dim]
    }

    /// V_T: the value after the last step (0 when terminated or without a bootstrap value).
    pub fn tail_value(&self) -> f64 {
        match self.end {
            End::Terminated => 0.0,
            End::Truncated { bootstrap } => bootstrap.unwrap_or(0.0),
        }
    }

    /// The logged column `name` at every step, when the episode carries it.
    pub fn logged_column(&self, name: &str) -> Option<Vec<f64>> {
        let k = self.logged_names.iter().position(|n| n == name)?;
        let w = self.logged_names.len();
        Some((0..self.len()).map(|t| self.logged[t * w + k]).collect())
    }

    /// Sum of rewards (the undiscounted return).
    pub fn total_reward(&self) -> f64 {
        self.rewards.iter().sum()
    }
}

/// Which optional per-step arrays an episode carries, and the vector widths.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Layout {
    pub value: bool,
    pub q: bool,
    pub logp: bool,
    pub score_dim: usize,
    pub obs_dim: usize,
    pub act_dim: usize,
    /// Headers of the logged per-step columns carried as they are (see `Episode::logged`).
    pub logged: std::sync::Arc<[String]>,
}
