//! Command-line definitions (clap derive) and their translation into the library's config
//! types. Nothing here reads data or computes; `run` calls the library and returns an exit code.

use crate::audit::{self, AuditConfig, DEFAULT_SEED};
use crate::error::{Error, Result};
use crate::estimator::Estimator;
use crate::gate::rules::RegressionRule;
use crate::gate::{self, Baseline, Rule, RuleSet};
use crate::log::{ColumnSpec, LogReader, Progress, ReadOptions};
use crate::report::{self, Format};
use crate::sweep::{self, Over, SweepConfig};
use crate::{inspect, output};
use clap::{Args, Parser, Subcommand, ValueEnum};

/// Exit codes, documented in the README.
pub mod exit {
    pub const OK: u8 = 0;
    pub const CHECK_FAILED: u8 = 1;
    pub const BAD_INPUT: u8 = 2;
}

#[derive(Debug, Parser)]
#[command(
    name = "gradaudit",
    version,
    about = "Audit policy-gradient estimators on recorded rollouts",
    long_about = "Audit policy-gradient estimators on recorded rollouts.\n\n\
        gradaudit reads a rollout log (one CSV row per step), forms each estimator's gradient \
        from the per-step score vectors, resamples whole episodes with a seeded bootstrap, and \
        reports each estimator's variance, bias against an unbiased reference, MSE, SNR and \
        effective sample size.\n\n\
        Exit codes: 0 success, 1 a check failed, 2 bad usage or bad input.",
    after_help = "Start with `gradaudit inspect LOG` to check how the log was read, then \
        `gradaudit audit LOG`."
)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Summarise a log: episodes, lengths, returns, column roles, warnings
    Inspect(InspectArgs),
    /// Compare policy-gradient estimators on a log: variance, bias, MSE, SNR, ESS
    Audit(AuditArgs),
    /// Sweep lambda, n or gamma: the bias-variance curve and the MSE-optimal setting
    Sweep(SweepArgs),
    /// Audit a log and check rules on the result: exit 1 when one fails (for CI)
    Gate(GateArgs),
    /// Check a logged advantage or value-target column against the reference computation;
    /// name the known fault that explains a difference (exit 1 when they differ)
    Crosscheck(CrosscheckArgs),
    /// Audit one part of a log into a shard file (Poisson resampling), for `merge`
    Shard(ShardArgs),
    /// Merge shard files into the audit report of all their episodes
    Merge(MergeArgs),
}

#[derive(Debug, Args)]
#[command(
    after_help = "Every shard of one audit must be written with the same options; each episode \
    must be in exactly one shard. The shards' Poisson weights are keyed by episode id, so the \
    merged report equals `audit --resampling poisson` of the whole log.\n\
    Example: gradaudit shard part-3.csv.gz --out part-3.shard; gradaudit merge part-*.shard"
)]
pub struct ShardArgs {
    #[command(flatten)]
    pub log: LogArgs,

    #[command(flatten)]
    pub audit: AuditOptions,

    /// The shard file to write (safetensors, format gradaudit.shard/2; see the README)
    #[arg(long, value_name = "FILE")]
    pub out: String,
}

#[derive(Debug, Args)]
pub struct MergeArgs {
    /// Shard files written by `gradaudit shard`
    #[arg(required = true, value_name = "SHARD")]
    pub shards: Vec<String>,

    #[command(flatten)]
    pub output: ReportOutput,
}

/// How to read the log (shared by every command).
#[derive(Debug, Args)]
pub struct LogArgs {
    /// Rollout log: CSV with a header row (optionally gzip-compressed), Parquet or Arrow IPC;
    /// `-` reads stdin (CSV); a folder stands for its files in name order
    pub log: String,

    /// Further logs read after the first as one log (same columns; an episode may not span
    /// files, except the runs of --env-col)
    #[arg(value_name = "MORE_LOGS")]
    pub more_logs: Vec<String>,

    /// Vector-environment layout: the column holding the environment index. Episode ids are
    /// then derived (ENV/RUN): each environment's rows in order, split after each end row
    #[arg(long, value_name = "HEADER")]
    pub env_col: Option<String>,

    /// Field delimiter (one ASCII character; `\t` for tab)
    #[arg(long, default_value = ",", value_name = "CHAR")]
    pub delimiter: String,

    /// Read role ROLE from column HEADER (repeatable). Roles: episode, step, reward,
    /// terminated, truncated, done, value, next_value, q, logp; and score, obs, act, next_obs
    /// for a list column of a Parquet or Arrow file. Without it, episode_id and rewards are
    /// read when the header has no episode or reward column
    #[arg(long = "col", value_name = "ROLE=HEADER")]
    pub columns: Vec<String>,

    /// Header prefix of the score-vector columns (score_0, score_1, ...)
    #[arg(long, default_value = "score_", value_name = "PREFIX")]
    pub score_prefix: String,

    /// Header prefix of the state-feature columns
    #[arg(long, default_value = "obs_", value_name = "PREFIX")]
    pub obs_prefix: String,

    /// Header prefix of the action columns
    #[arg(long, default_value = "act_", value_name = "PREFIX")]
    pub act_prefix: String,

    /// Header prefix of the next-observation columns (the obs after each step, for a value
    /// network's bootstrap). Default: next_ followed by the obs prefix (next_obs_0, ...)
    #[arg(long, value_name = "PREFIX")]
    pub next_obs_prefix: Option<String>,

    /// No progress bar (it is shown only when stderr is a terminal anyway)
    #[arg(long, short)]
    pub quiet: bool,

    /// Memory a run may hold, in MB (open episodes while reading; per-episode summaries and
    /// resamples after). Default: 80% of the memory available when the run starts
    #[arg(long, value_name = "MB")]
    pub max_memory: Option<u64>,

    /// The run's one budget, made on first use: every holder of the run (the reader, the
    /// command's summaries) charges its one ledger.
    #[arg(skip)]
    pub ledger: std::sync::OnceLock<crate::limits::Budget>,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum InspectFormat {
    Table,
    Json,
    /// One self-contained HTML page
    Html,
}

#[derive(Debug, Args)]
pub struct InspectArgs {
    #[command(flatten)]
    pub log: LogArgs,
    /// Output format
    #[arg(long, value_enum, default_value_t = InspectFormat::Table)]
    pub format: InspectFormat,

    /// Discount of the returns that the critic quality is measured against
    #[arg(long, default_value_t = 0.99)]
    pub gamma: f64,

    /// Also fit a cross-fitted value baseline and report its quality (reads the log twice)
    #[arg(long)]
    pub fit_value: bool,

    /// Also check this policy file against the log's columns and show it (for a network: its
    /// layers, parameter count, normalisation and which tensors form theta)
    #[arg(long, value_name = "FILE")]
    pub policy: Option<String>,

    /// Write the summary here (atomically, checked before the log is read) instead of stdout
    #[arg(long, value_name = "FILE", default_value = "-")]
    pub out: String,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum AuditFormat {
    Table,
    Json,
    Csv,
    Markdown,
    /// One self-contained HTML page (figures inline, no network access)
    Html,
}

/// What an audit computes (shared by `audit` and `gate`).
#[derive(Debug, Args)]
pub struct AuditOptions {
    /// Discount factor gamma of the discounted estimators, in [0, 1]
    #[arg(long, default_value_t = 0.99)]
    pub gamma: f64,

    /// Comma list of estimators, e.g. `rtg,gae:0.9,nstep:10`. Default: every estimator the
    /// log's columns allow (total, rtg, rtg_discounted, mean_baseline, whitened,
    /// value_baseline, q, advantage_q, td, nstep:1,5,20, gae:0,0.5,0.9,0.95,0.97,1)
    #[arg(long, value_name = "LIST")]
    pub estimators: Option<String>,

    /// The unbiased reference that bias is measured against
    #[arg(long, default_value = "rtg", value_name = "NAME")]
    pub reference: String,

    /// Bootstrap resamples B (whole episodes drawn with replacement)
    #[arg(long, default_value_t = 2000, value_name = "B")]
    pub resamples: usize,

    /// Seed of every random draw; the same seed gives the same report
    #[arg(long, default_value_t = DEFAULT_SEED)]
    pub seed: u64,

    /// Confidence level of every interval (percentile, BCa, jackknife or studentised by figure:
    /// README, "Statistics")
    #[arg(long, default_value_t = 0.95)]
    pub confidence: f64,

    /// SNR that `episodes@snr` plans for
    #[arg(long, default_value_t = 1.0, value_name = "SNR")]
    pub target_snr: f64,

    /// Random half splits behind cosine_half
    #[arg(long, default_value_t = 200, value_name = "N")]
    pub splits: usize,

    /// Level of the bias decisions across the whole table (a bias is detected when its
    /// adjusted p-value is at most this)
    #[arg(long, default_value_t = 0.05, value_name = "ALPHA")]
    pub bias_level: f64,

    /// What the bias decisions control across the table: holm (family-wise error rate) or bh
    /// (Benjamini-Hochberg false-discovery rate)
    #[arg(long, value_enum, default_value = "holm")]
    pub multiplicity: MultiplicityArg,

    /// Compute the score vectors from the obs and act columns with this policy file (JSON,
    /// schema gradaudit.policy/1: a linear family, or an MLP with safetensors weights; see the
    /// README)
    #[arg(long, value_name = "FILE")]
    pub policy: Option<String>,

    /// With both score columns and --policy: which scores to use
    #[arg(long, value_enum, value_name = "SOURCE")]
    pub scores_from: Option<ScoresFromArg>,

    /// Fit V(s_t) by ridge regression on obs features and time, cross-fitted by episode, and use
    /// it instead of the log's value column and as the bootstrap value of truncated episodes
    /// without next_value (reads the log twice)
    #[arg(long)]
    pub fit_value: bool,

    /// Folds of the cross-fitting
    #[arg(long, default_value_t = 5, value_name = "K")]
    pub folds: usize,

    /// Ridge penalty of the value fit, relative to the standardised features
    #[arg(long, default_value_t = 1e-3, value_name = "ALPHA")]
    pub ridge: f64,

    /// The K score columns are random projections z_j . grad log pi (E[z z^T] = I) of a larger
    /// score vector: report estimates of the full-gradient figures
    #[arg(long, value_name = "K")]
    pub score_sketch: Option<usize>,

    /// Project a policy network's scores onto K random directions inside gradaudit: `auto`
    /// projects onto 64 when the policy has more than 256 parameters, `exact` never projects,
    /// a number K always does (see the README, 'Large networks')
    #[arg(long, default_value = "auto", value_name = "K|auto|exact")]
    pub project: String,

    /// Compute V(s_t) from this value network (description JSON, family mlp_value, with its
    /// safetensors weights) for the value-based estimators, instead of a value column; also
    /// the bootstrap value of truncated episodes (at the logged next observation, else the
    /// last one)
    #[arg(long, value_name = "FILE")]
    pub value_net: Option<String>,

    /// Bootstrap scheme: `multinomial` draws N episodes with replacement (holds one summary row
    /// per episode); `poisson` weights each episode Poisson(1) per replicate, keyed by its id,
    /// and sums as episodes end (memory independent of the episode count; `shard` files of it
    /// merge exactly)
    #[arg(long, value_enum, default_value_t = ResamplingArg::Multinomial)]
    pub resampling: ResamplingArg,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq, ValueEnum)]
pub enum ResamplingArg {
    Multinomial,
    Poisson,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum ScoresFromArg {
    Policy,
    Columns,
}

#[derive(Debug, Args)]
pub struct AuditArgs {
    #[command(flatten)]
    pub log: LogArgs,

    #[command(flatten)]
    pub audit: AuditOptions,

    #[command(flatten)]
    pub output: ReportOutput,
}

/// Where and how `audit` and `sweep` write their report.
#[derive(Debug, Args)]
pub struct ReportOutput {
    /// Output format
    #[arg(long, value_enum, default_value_t = AuditFormat::Table)]
    pub format: AuditFormat,

    /// Write the report here (atomically) instead of stdout
    #[arg(long, value_name = "FILE", default_value = "-")]
    pub out: String,

    /// Also draw the report as SVG: audit, each estimator's MSE split into bias^2 and
    /// variance; sweep, bias^2, variance and MSE against the swept parameter
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<String>,

    /// Table format: every column in one table, wider than 100 columns (by default the
    /// audit's interval ends go in a second block, and the sweep leaves out the estimator names)
    #[arg(long)]
    pub wide: bool,
}

/// The checked outputs of `audit` or `sweep`: the report and the optional plot.
struct ReportSlots {
    outputs: output::Outputs,
    out: output::Slot,
    plot: Option<output::Slot>,
}

impl ReportOutput {
    /// Checks every output path before any reading; none may be one of `inputs`.
    fn check(&self, inputs: &[&str]) -> Result<ReportSlots> {
        if self.wide && !matches!(self.format, AuditFormat::Table) {
            return Err(Error::usage("--wide applies to --format table only"));
        }
        let mut outputs = output::Outputs::new(inputs);
        let out = outputs.add("--out", &self.out)?;
        let plot = self
            .plot
            .as_deref()
            .map(|p| outputs.add("--plot", p))
            .transpose()?;
        output::test_pause("checked");
        Ok(ReportSlots { outputs, out, plot })
    }
}

impl ReportSlots {
    /// Writes the report and, when asked for, the plot (`svg` renders it): both or neither.
    fn write(
        self,
        text: String,
        svg: impl FnOnce() -> std::result::Result<String, String>,
    ) -> Result<()> {
        let mut texts = vec![(self.out, text)];
        if let Some(p) = self.plot {
            texts.push((p, svg().map_err(Error::usage)?));
        }
        self.outputs.write(texts)
    }
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum SweepOver {
    /// GAE(lambda) over lambda in [0, 1]
    Lambda,
    /// n-step advantages over the window n
    Nstep,
    /// an estimator over the discount gamma (the reference stays undiscounted)
    Gamma,
}

#[derive(Debug, Args)]
#[command(
    after_help = "Default grids: lambda 0:1:0.05; nstep 1,2,4,8,16,32,64,full; gamma \
    0.9,0.95,0.97,0.99,0.995,1. A grid is a comma list or start:stop:step.\n\
    Example: gradaudit sweep rollouts.csv --over lambda --plot lambda.svg"
)]
pub struct SweepArgs {
    #[command(flatten)]
    pub log: LogArgs,

    #[command(flatten)]
    pub audit: AuditOptions,

    /// The parameter to sweep
    #[arg(long, value_enum)]
    pub over: SweepOver,

    /// Grid points: a comma list or start:stop:step (nstep also takes `full`)
    #[arg(long, value_name = "SPEC")]
    pub grid: Option<String>,

    /// The estimator swept over gamma
    #[arg(long, default_value = "rtg_discounted", value_name = "NAME")]
    pub estimator: String,

    #[command(flatten)]
    pub output: ReportOutput,
}

impl SweepArgs {
    pub fn config(&self) -> Result<SweepConfig> {
        if self.audit.estimators.is_some() {
            return Err(Error::usage(
                "sweep takes --grid (and --estimator for gamma sweeps), not --estimators",
            ));
        }
        let audit = self.audit.config(&self.log)?;
        if audit.resampling != crate::audit::Resampling::Multinomial {
            return Err(Error::usage(
                "sweep resamples with the multinomial bootstrap only; drop --resampling",
            ));
        }
        let over = match self.over {
            SweepOver::Lambda => Over::Lambda,
            SweepOver::Nstep => Over::Nstep,
            SweepOver::Gamma => Over::Gamma,
        };
        let family = Estimator::parse(&self.estimator)
            .map_err(|e| Error::usage(format!("--estimator {e}")))?;
        let spec = self.grid.as_deref().unwrap_or(over.default_grid());
        let grid = sweep::parse_grid(over, spec, family, audit.gamma)
            .map_err(|e| Error::usage(format!("--grid {e}")))?;
        Ok(SweepConfig {
            audit,
            over,
            grid,
            family,
        })
    }
}

impl LogArgs {
    pub fn read_options(&self) -> Result<ReadOptions> {
        let delimiter = match self.delimiter.as_str() {
            "\\t" | "tab" => b'\t',
            d if d.len() == 1 && d.is_ascii() => d.as_bytes()[0],
            d => {
                return Err(Error::usage(format!(
                    "--delimiter '{d}': give one ASCII character (or \\t for tab)"
                )));
            }
        };
        let mut columns = ColumnSpec::default();
        for c in &self.columns {
            columns
                .remap(c)
                .map_err(|e| Error::usage(format!("--col {e}")))?;
        }
        columns.score_prefix = self.score_prefix.clone();
        columns.obs_prefix = self.obs_prefix.clone();
        columns.act_prefix = self.act_prefix.clone();
        columns.next_obs_prefix = self.next_obs_prefix.clone();
        columns.env = self.env_col.clone();
        Ok(ReadOptions {
            delimiter,
            columns,
            progress: if self.quiet {
                Progress::Hidden
            } else {
                Progress::Auto
            },
            budget: self.budget()?,
        })
    }

    /// The memory budget: --max-memory (at most the machine's memory), else the default.
    pub fn budget(&self) -> Result<crate::limits::Budget> {
        if let Some(b) = self.ledger.get() {
            return Ok(b.clone());
        }
        let b = self.max_memory.map_or_else(
            || Ok(crate::limits::Budget::default()),
            crate::limits::Budget::from_option,
        )?;
        Ok(self.ledger.get_or_init(|| b).clone())
    }

    /// The first pass of --fit-value: fits a critic on the log (which must be a file: it is
    /// read again to apply the critic).
    pub fn fit_critic(&self, fit: &crate::critic::FitConfig) -> Result<crate::critic::Critic> {
        if self.log == "-" {
            return Err(Error::usage(
                "--fit-value reads the log twice (fit, then apply); give a file, not stdin",
            ));
        }
        crate::critic::fit(self.open()?, fit)
    }

    pub fn open(&self) -> Result<LogReader> {
        self.open_with(&self.read_options()?)
    }

    /// Opens the log and its further files (`MORE_LOGS`) as one log.
    pub fn open_with(&self, options: &ReadOptions) -> Result<LogReader> {
        LogReader::open_many(&self.paths(), options)
    }

    /// Every input log path: the first and the further ones.
    pub fn paths(&self) -> Vec<String> {
        let mut paths = vec![self.log.clone()];
        paths.extend(self.more_logs.iter().cloned());
        paths
    }
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum GateFormat {
    Text,
    Markdown,
    Json,
    /// One self-contained HTML page: the checks, then the audit they were checked on
    Html,
}

#[derive(Debug, Args)]
#[command(
    after_help = "Rules: ESTIMATOR:STAT>=VALUE or ESTIMATOR:STAT<=VALUE, ESTIMATOR may be \
    `*` (every audited estimator); append @interval to require the bound at the pessimistic end \
    of the bootstrap interval, and ? to let an undefined statistic pass. Statistics: snr, ess, \
    relative_bias, relative_variance, cosine_half, episodes_for_snr (also variance, bias_sq, mse).\n\
    Example: gradaudit gate eval.csv --require 'gae:0.95:snr>=2@interval' --require '*:relative_bias<=0.5'\n\
    Exit codes: 0 every check holds, 1 a check failed, 2 bad usage or bad input."
)]
pub struct GateArgs {
    #[command(flatten)]
    pub log: LogArgs,

    #[command(flatten)]
    pub audit: AuditOptions,

    /// Rules file (JSON, schema gradaudit.rules/1; see the README)
    #[arg(long, value_name = "FILE")]
    pub rules: Option<String>,

    /// A rule as a flag (repeatable), e.g. `gae:0.95:snr>=2@interval`
    #[arg(long, value_name = "RULE")]
    pub require: Vec<String>,

    /// A previous report (`audit --format json` or `gate --format json`) to check for regressions
    #[arg(long, value_name = "FILE")]
    pub baseline: Option<String>,

    /// Regression bound STAT:PCT or ESTIMATOR:STAT:PCT (repeatable), e.g. `variance:25`: fail
    /// when the statistic is more than PCT percent worse than in the baseline. With --baseline
    /// and no regression bound, `variance:25` applies
    #[arg(long, value_name = "SPEC")]
    pub regress: Vec<String>,

    /// Output format of the summary
    #[arg(long, value_enum, default_value_t = GateFormat::Text)]
    pub format: GateFormat,

    /// Write the summary here (atomically) instead of stdout
    #[arg(long, value_name = "FILE", default_value = "-")]
    pub out: String,

    /// Also write the result as JUnit XML (one test case per rule and estimator)
    #[arg(long, value_name = "FILE")]
    pub junit: Option<String>,
}

impl GateArgs {
    pub fn rule_set(&self) -> Result<RuleSet> {
        let mut set = match &self.rules {
            Some(path) => RuleSet::load(path)?,
            None => RuleSet::default(),
        };
        for r in &self.require {
            set.rules
                .push(Rule::parse_flag(r).map_err(|e| Error::usage(format!("--require {e}")))?);
        }
        for r in &self.regress {
            set.regressions.push(
                RegressionRule::parse_flag(r)
                    .map_err(|e| Error::usage(format!("--regress {e}")))?,
            );
        }
        if self.baseline.is_some() && set.regressions.is_empty() {
            set.regressions
                .push(RegressionRule::parse_flag("variance:25").expect("valid"));
        }
        if self.baseline.is_none() && !set.regressions.is_empty() {
            return Err(Error::usage("regression bounds need --baseline FILE"));
        }
        if set.rules.is_empty() && set.regressions.is_empty() {
            return Err(Error::usage(
                "nothing to check: give --rules FILE, --require RULE or --baseline FILE",
            ));
        }
        Ok(set)
    }
}

impl AuditOptions {
    /// The first pass of --fit-value: fits the critic on the log.
    pub fn fit_critic(&self, log: &LogArgs, gamma: f64) -> Result<Option<crate::critic::Critic>> {
        if !self.fit_value {
            return Ok(None);
        }
        if !(self.ridge >= 0.0 && self.ridge.is_finite()) {
            return Err(Error::usage("--ridge must be a number >= 0"));
        }
        let fit = crate::critic::FitConfig {
            folds: self.folds,
            ridge: self.ridge,
            gamma,
            in_sample: false,
            budget: log.budget()?,
        };
        log.fit_critic(&fit).map(Some)
    }

    /// The audit's config; `log` supplies the memory budget.
    pub fn config(&self, log: &LogArgs) -> Result<AuditConfig> {
        let estimators = match &self.estimators {
            Some(list) => Some(
                Estimator::parse_list(list)
                    .map_err(|e| Error::usage(format!("--estimators {e}")))?,
            ),
            None => None,
        };
        let reference = Estimator::parse(&self.reference)
            .map_err(|e| Error::usage(format!("--reference {e}")))?;
        let cfg = AuditConfig {
            gamma: self.gamma,
            estimators,
            reference,
            resamples: self.resamples,
            seed: self.seed,
            confidence: self.confidence,
            target_snr: self.target_snr,
            splits: self.splits,
            policy: self.policy.clone(),
            scores_from: self.scores_from.map(|s| match s {
                ScoresFromArg::Policy => crate::audit::ScoresFrom::Policy,
                ScoresFromArg::Columns => crate::audit::ScoresFrom::Columns,
            }),
            sketch: self.score_sketch,
            project: crate::policy::projection::ProjectMode::parse(&self.project)
                .map_err(|e| Error::usage(format!("--project {e}")))?,
            value_net: self.value_net.clone(),
            budget: log.budget()?,
            bias_level: self.bias_level,
            multiplicity: match self.multiplicity {
                MultiplicityArg::Holm => crate::stats::Multiplicity::Holm,
                MultiplicityArg::Bh => crate::stats::Multiplicity::Bh,
            },
            resampling: match self.resampling {
                ResamplingArg::Multinomial => crate::audit::Resampling::Multinomial,
                ResamplingArg::Poisson => crate::audit::Resampling::Poisson,
            },
            ..AuditConfig::default()
        };
        cfg.validate()?;
        Ok(cfg)
    }
}

impl AuditArgs {
    fn format(&self) -> Format {
        self.output.report_format()
    }
}

impl ReportOutput {
    /// The report format these options ask for (audit and merge share it).
    fn report_format(&self) -> Format {
        match self.format {
            AuditFormat::Table if self.wide => Format::WideTable,
            AuditFormat::Table => Format::Table,
            AuditFormat::Json => Format::Json,
            AuditFormat::Csv => Format::Csv,
            AuditFormat::Markdown => Format::Markdown,
            AuditFormat::Html => Format::Html,
        }
    }
}

/// `gradaudit inspect`: the log's summary, with the critic and the policy when asked for.
fn run_inspect(a: InspectArgs) -> Result<()> {
    if !(0.0..=1.0).contains(&a.gamma) {
        return Err(Error::usage(format!(
            "--gamma {} must lie in [0, 1]",
            a.gamma
        )));
    }
    // Like every command's --out: checked before the log is read, never one of the inputs.
    let paths = a.log.paths();
    let mut inputs: Vec<&str> = paths.iter().map(String::as_str).collect();
    inputs.extend(a.policy.as_deref());
    let mut outputs = output::Outputs::new(&inputs);
    let out = outputs.add("--out", &a.out)?;
    output::test_pause("checked");
    let critic = if a.fit_value {
        let fit = crate::critic::FitConfig {
            gamma: a.gamma,
            budget: a.log.budget()?,
            ..Default::default()
        };
        Some(a.log.fit_critic(&fit)?)
    } else {
        None
    };
    let reader = a.log.open()?;
    let policy = a
        .policy
        .as_deref()
        .map(|p| crate::policy::Policy::load(p, reader.schema()))
        .transpose()?;
    let mut report = inspect::run(reader, a.gamma, critic.as_ref(), a.log.budget()?)?;
    report.policy = policy.map(|p| p.summary());
    let text = match a.format {
        InspectFormat::Table => {
            let mut t = report::inspect::render_text(&report);
            if let Some(p) = &report.policy {
                t.push_str(&p.render_text());
            }
            t
        }
        InspectFormat::Json => report::inspect::render_json(&report),
        InspectFormat::Html => report::html::inspect(&report),
    };
    outputs.write(vec![(out, text)])
}

/// Runs a parsed command line; returns the exit code.
pub fn run(cli: Cli) -> Result<u8> {
    match cli.command {
        Command::Inspect(a) => run_inspect(a)?,
        Command::Audit(a) => return run_audit(a),
        Command::Sweep(s) => return run_sweep(s),
        Command::Gate(g) => return run_gate(g),
        Command::Crosscheck(c) => return run_crosscheck(c),
        Command::Shard(s) => run_shard(s)?,
        Command::Merge(m) => run_merge(m)?,
    }
    Ok(exit::OK)
}

impl AuditOptions {
    /// The input files of an audit that no output may replace (the log, the policy, the value
    /// network).
    fn inputs<'a>(&'a self, log: &'a LogArgs) -> Vec<&'a str> {
        let mut inputs = vec![log.log.as_str()];
        inputs.extend(log.more_logs.iter().map(String::as_str));
        inputs.extend(self.policy.as_deref());
        inputs.extend(self.value_net.as_deref());
        inputs
    }
}

/// Opens the log for an audit, carrying the columns of `column:HEADER` estimators.
fn open_for(log: &LogArgs, cfg: &AuditConfig) -> Result<LogReader> {
    let mut options = log.read_options()?;
    let mut logged: Vec<String> = Vec::new();
    for e in cfg.estimators.iter().flatten().chain([&cfg.reference]) {
        if let Estimator::Column(h) = e
            && !logged.iter().any(|l| l == h)
        {
            logged.push(h.to_string());
        }
    }
    options.columns.logged = logged;
    log.open_with(&options)
}

fn run_audit(a: AuditArgs) -> Result<u8> {
    let mut cfg = a.audit.config(&a.log)?;
    let slots = a.output.check(&a.audit.inputs(&a.log))?;
    cfg.critic = a.audit.fit_critic(&a.log, cfg.gamma)?;
    let report = audit::run(open_for(&a.log, &cfg)?, &cfg)?;
    slots.write(report::render(&report, a.format()), || {
        report::svg::audit_bars(&report)
    })?;
    Ok(exit::OK)
}

fn run_sweep(s: SweepArgs) -> Result<u8> {
    let mut cfg = s.config()?;
    let slots = s.output.check(&s.audit.inputs(&s.log))?;
    cfg.audit.critic = s.audit.fit_critic(&s.log, cfg.audit.gamma)?;
    let report = sweep::run(s.log.open()?, &cfg)?;
    let text = match s.output.format {
        AuditFormat::Table => report::sweep::render_table_with(&report, s.output.wide),
        AuditFormat::Json => report::sweep::render_json(&report),
        AuditFormat::Csv => report::sweep::render_csv(&report),
        AuditFormat::Markdown => report::sweep::render_markdown(&report),
        AuditFormat::Html => report::html::sweep(&report),
    };
    slots.write(text, || report::svg::sweep_plot(&report))?;
    Ok(exit::OK)
}

fn run_gate(g: GateArgs) -> Result<u8> {
    let mut cfg = g.audit.config(&g.log)?;
    // The baseline may be replaced (a rolling baseline); the log, policy and rules may not.
    let mut inputs = g.audit.inputs(&g.log);
    inputs.extend(g.rules.as_deref());
    let mut outputs = output::Outputs::new(&inputs);
    let out = outputs.add("--out", &g.out)?;
    let junit = g
        .junit
        .as_deref()
        .map(|j| outputs.add("--junit", j))
        .transpose()?;
    output::test_pause("checked");
    let rules = g.rule_set()?;
    let baseline = g.baseline.as_deref().map(Baseline::load).transpose()?;
    gate::include_named(&mut cfg, &rules);
    cfg.critic = g.audit.fit_critic(&g.log, cfg.gamma)?;
    let result = gate::run(
        audit::run(open_for(&g.log, &cfg)?, &cfg)?,
        &rules,
        baseline.as_ref(),
    )?;
    let text = match g.format {
        GateFormat::Text => report::gate::render_text(&result),
        GateFormat::Markdown => report::gate::render_markdown(&result),
        GateFormat::Json => report::gate::render_json(&result),
        GateFormat::Html => report::html::gate(&result),
    };
    let mut texts = vec![(out, text)];
    if let Some(j) = junit {
        texts.push((j, report::gate::render_junit(&result)));
    }
    outputs.write(texts)?;
    Ok(if result.passed {
        exit::OK
    } else {
        exit::CHECK_FAILED
    })
}

/// `--multiplicity`: the procedure behind the table-wide bias decisions.
#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum MultiplicityArg {
    /// Holm (1979): family-wise error rate
    Holm,
    /// Benjamini and Hochberg (1995): false-discovery rate
    Bh,
}

#[derive(Debug, Clone, Copy, ValueEnum)]
pub enum CrosscheckFormat {
    Table,
    Json,
    Markdown,
    /// One self-contained page (report/html/crosscheck.rs)
    Html,
}

#[derive(Debug, Args)]
#[command(
    after_help = "Example: gradaudit crosscheck rollouts.csv --advantage adv \
    --estimator gae:0.95 --gamma 0.99\n\
    Exit codes: 0 every checked column agrees, 1 a column differs, 2 bad usage or bad input."
)]
pub struct CrosscheckArgs {
    #[command(flatten)]
    pub log: LogArgs,

    /// Header of the logged per-step advantage column to check
    #[arg(long, value_name = "HEADER")]
    pub advantage: Option<String>,

    /// Header of the logged per-step value-target (return) column to check: advantage + V_t
    #[arg(long = "returns", value_name = "HEADER")]
    pub returns: Option<String>,

    /// The computation the column claims to follow: gae:LAMBDA (or gae with --lambda),
    /// nstep:N, or rtg_discounted (the discounted return, bootstrapped at truncation)
    #[arg(long, default_value = "gae:0.95", value_name = "NAME")]
    pub estimator: String,

    /// Discount factor gamma of the claimed computation, in [0, 1]
    #[arg(long, default_value_t = 0.99)]
    pub gamma: f64,

    /// Lambda of a GAE claim (overrides gae:L)
    #[arg(long, value_name = "L")]
    pub lambda: Option<f64>,

    /// One absolute tolerance for every step, instead of the one chosen from the column's
    /// precision and the magnitudes involved (see the README)
    #[arg(long, value_name = "ABS")]
    pub tolerance: Option<f64>,

    /// Output format
    #[arg(long, value_enum, default_value_t = CrosscheckFormat::Table)]
    pub format: CrosscheckFormat,

    /// Write the report here (atomically) instead of stdout
    #[arg(long, value_name = "FILE", default_value = "-")]
    pub out: String,
}

impl CrosscheckArgs {
    /// The check's config: the claim, the columns and the tolerance.
    pub fn config(&self) -> Result<crate::crosscheck::CheckConfig> {
        if self.advantage.is_none() && self.returns.is_none() {
            return Err(Error::usage(
                "nothing to check: give --advantage HEADER and/or --returns HEADER",
            ));
        }
        let name = match (self.estimator.trim(), self.lambda) {
            ("gae", Some(l)) => format!("gae:{l}"),
            ("gae", None) => return Err(Error::usage("--estimator gae needs --lambda L")),
            (e, Some(l)) if e.starts_with("gae:") => format!("gae:{l}"),
            (_, Some(_)) => return Err(Error::usage("--lambda applies to a gae estimator only")),
            (e, None) => e.to_string(),
        };
        if !(0.0..=1.0).contains(&self.gamma) {
            return Err(Error::usage(format!(
                "--gamma {} must lie in [0, 1]",
                self.gamma
            )));
        }
        let claim = crate::crosscheck::Claimed::parse(&name, self.gamma)
            .map_err(|e| Error::usage(format!("--estimator {e}")))?;
        if let Some(t) = self.tolerance
            && !(t > 0.0 && t.is_finite())
        {
            return Err(Error::usage("--tolerance must be a positive number"));
        }
        Ok(crate::crosscheck::CheckConfig {
            claim,
            advantage: self.advantage.clone(),
            ret: self.returns.clone(),
            tolerance: self.tolerance,
            budget: self.log.budget()?,
        })
    }
}

fn run_crosscheck(c: CrosscheckArgs) -> Result<u8> {
    let cfg = c.config()?;
    let paths = c.log.paths();
    let inputs: Vec<&str> = paths.iter().map(String::as_str).collect();
    let mut outputs = output::Outputs::new(&inputs);
    let out = outputs.add("--out", &c.out)?;
    output::test_pause("checked");
    let mut options = c.log.read_options()?;
    options.columns.logged = cfg.columns().into_iter().map(|(_, h)| h).collect();
    let report = crate::crosscheck::run(c.log.open_with(&options)?, &cfg)?;
    let text = match c.format {
        CrosscheckFormat::Table => report::crosscheck::render_table(&report),
        CrosscheckFormat::Json => report::crosscheck::render_json(&report),
        CrosscheckFormat::Markdown => report::crosscheck::render_markdown(&report),
        CrosscheckFormat::Html => report::html::crosscheck(&report),
    };
    outputs.write(vec![(out, text)])?;
    Ok(if report.agree {
        exit::OK
    } else {
        exit::CHECK_FAILED
    })
}

/// `gradaudit shard`: one part of a log into a shard file.
fn run_shard(a: ShardArgs) -> Result<()> {
    let mut cfg = a.audit.config(&a.log)?;
    let mut outputs = output::Outputs::new(&a.audit.inputs(&a.log));
    let out = outputs.add("--out", &a.out)?;
    output::test_pause("checked");
    cfg.critic = a.audit.fit_critic(&a.log, cfg.gamma)?;
    let shard = crate::shard::write_shard(a.log.open()?, &cfg)?;
    outputs.write_bytes(vec![(out, crate::shard::encode(&shard)?)])
}

/// `gradaudit merge`: shard files into one audit report.
fn run_merge(m: MergeArgs) -> Result<()> {
    let inputs: Vec<&str> = m.shards.iter().map(String::as_str).collect();
    let slots = m.output.check(&inputs)?;
    let mut shards = Vec::new();
    for path in &m.shards {
        let bytes = std::fs::read(path).map_err(|e| Error::io(path, e))?;
        shards.push(crate::shard::MergeInput {
            name: path.clone(),
            shard: crate::shard::decode(path, &bytes)?,
        });
    }
    let report = crate::shard::merged_report(shards)?;
    slots.write(report::render(&report, m.output.report_format()), || {
        report::svg::audit_bars(&report)
    })
}
