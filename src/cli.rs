//! The command line: parses arguments and calls the library.

use std::io::IsTerminal;
use std::future::Future;
use std::path::{Path, PathBuf};
use std::process::ExitCode;
use std::sync::Arc;

use clap::{Parser, Subcommand};
use indicatif::{ProgressBar, ProgressStyle};

use crate::config::{self, Config, ConfigError, ResolvedExperiment, Source};
use crate::console::{self, Unwritable};
use crate::core::{PolicySpec, RewardModel};
use crate::telemetry::http::Served;
use crate::core::decision::Settle;
use crate::sim::{self, SimSpec};
use crate::telemetry::Metrics;
use crate::{say, sayln};

#[derive(Parser, Debug)]
#[command(name = "apportion", version, about = "Allocates live traffic between experiment arms with bandit policies")]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Run the sidecar: read events, publish weights, serve metrics.
    Run {
        /// Configuration file (default config/apportion.toml when it exists).
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
    },
    /// Everything on one machine with nothing installed: an in-process Kafka-protocol broker,
    /// synthetic traffic for a fictional recipe-video app, the sidecar and its metrics.
    Demo(crate::demo::DemoArgs),
    /// Compare policies on simulated arms before a launch.
    Simulate(SimulateArgs),
    /// Validate a configuration and print the resolved experiments.
    Check {
        #[arg(long, value_name = "FILE")]
        config: Option<PathBuf>,
    },
    /// Change experiments while the sidecars run (through the control topic), or list them.
    Experiment(ExperimentArgs),
}

#[derive(clap::Args, Debug)]
pub struct ExperimentArgs {
    #[command(subcommand)]
    pub action: ExperimentAction,
    /// Configuration file with the broker settings (default config/apportion.toml when it exists).
    #[arg(long, value_name = "FILE", global = true)]
    pub config: Option<PathBuf>,
    /// Who makes the change (default: the OS user); shown in /experiments and logged.
    #[arg(long, value_name = "NAME", global = true)]
    pub by: Option<String>,
    /// Why; shown in /experiments and logged.
    #[arg(long, value_name = "TEXT", global = true)]
    pub note: Option<String>,
}

#[derive(Subcommand, Debug)]
pub enum ExperimentAction {
    /// Define (or redefine) an experiment from a TOML or JSON file; checked before it is written.
    Define {
        #[arg(value_name = "FILE")]
        file: PathBuf,
    },
    /// Hold the weights at the last published ones (statistics keep counting).
    Freeze { id: String },
    /// Let the policy set the weights again.
    Resume { id: String },
    /// Send all traffic to one arm (pinned arms keep theirs).
    Conclude {
        id: String,
        #[arg(long, value_name = "ARM")]
        winner: String,
    },
    /// End the experiment: a last weights message, then its key leaves the weights topic.
    Retire { id: String },
    /// Every experiment with its state, revision, arms, leader and last publish.
    List {
        /// One JSON array, with each experiment's definition in force.
        #[arg(long)]
        json: bool,
    },
}

#[derive(clap::Args, Debug)]
pub struct SimulateArgs {
    /// True mean reward of each arm, comma-separated (0/1 rewards unless --reward-max is given).
    #[arg(long, value_delimiter = ',', required = true)]
    pub arms: Vec<f64>,
    /// Policies to compare, comma-separated, each `name[:key=value…]`, e.g.
    /// `thompson,ucb1,epsilon-greedy:c=6:d=0.01,kl-ucb:c=3,fixed:arm-1=0.5:arm-2=0.5`.
    #[arg(long, value_delimiter = ',', default_value = "thompson,ucb1,kl-ucb,epsilon-greedy")]
    pub policies: Vec<PolicySpec>,
    /// Pulls per run.
    #[arg(long, default_value_t = 10_000)]
    pub horizon: u64,
    /// Independent runs per policy.
    #[arg(long, default_value_t = 100)]
    pub runs: u32,
    /// Impressions between weight updates; 1 lets the policy decide every pull.
    #[arg(long, default_value_t = 1)]
    pub batch: u64,
    /// Seed of the random generator; the same seed gives the same results.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Bounded rewards: arms' means are amounts in [0, MAX], rewards drawn as MAX·Beta.
    #[arg(long, value_name = "MAX")]
    pub reward_max: Option<f64>,
    /// Worker threads (default: all cores). Results do not depend on it.
    #[arg(long)]
    pub threads: Option<usize>,
    /// Print one JSON object instead of the table.
    #[arg(long)]
    pub json: bool,
    /// Also draw mean regret against t to this SVG file (other extensions are refused).
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Rewards arrive this long after their impression: `exp:MEAN_SECONDS` (exponential) or
    /// `fixed:SECONDS`. Shows what the delay costs in regret and in the estimates' bias.
    #[arg(long, value_name = "DELAY")]
    pub reward_delay: Option<sim::Delay>,
    /// Impressions per second, which turns pulls into time for --reward-delay.
    #[arg(long, value_name = "PER_SECOND", default_value_t = 100.0)]
    pub rate: f64,
    /// Attribute rewards to their impressions under a window of this many seconds, as the
    /// sidecar does with `attribution_window_seconds`.
    #[arg(long, value_name = "SECONDS")]
    pub attribution_window: Option<f64>,
    /// Study the settle rule: when each run first counts as settled, and on which arm.
    #[arg(long)]
    pub settle: bool,
    /// The rule's least probability of best for the leader (with --settle).
    #[arg(long, value_name = "P", default_value_t = Settle::default().best_probability)]
    pub settle_best_probability: f64,
    /// The rule's largest expected loss, as a share of the leader's mean (with --settle).
    #[arg(long, value_name = "SHARE", default_value_t = Settle::default().relative_loss)]
    pub settle_relative_loss: f64,
    /// The rule's least matured pulls on every arm (with --settle).
    #[arg(long, value_name = "PULLS", default_value_t = Settle::default().min_pulls)]
    pub settle_min_pulls: u64,
    /// Pulls between looks at the rule, as a sidecar looks at each publish (with --settle).
    #[arg(long, value_name = "PULLS", default_value_t = 100)]
    pub settle_every: u64,
}

/// Runs the command line until done or until `signal` completes (the binary passes
/// [`crate::shutdown::terminated`]); the exit code is 2 for bad input, 1 for failures.
pub fn main(signal: impl Future<Output = ()> + Send + 'static) -> ExitCode {
    let cli = Cli::parse();
    match cli.command {
        Command::Run { config } => run(config, signal),
        Command::Demo(args) => crate::demo::main(args, signal),
        Command::Simulate(args) => simulate(args),
        Command::Check { config } => check(config),
        Command::Experiment(args) => experiment(args),
    }
}

fn experiment(args: ExperimentArgs) -> ExitCode {
    use crate::control::command::{self, Change, CommandError, Known};
    let (cfg, _) = match load_config(args.config) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("apportion experiment: {e}");
            return ExitCode::from(2);
        }
    };
    // The command says what failed itself; librdkafka's own connection logs would only repeat it.
    crate::telemetry::init_logging(&cfg.log.format, "off");
    let change = match args.action {
        ExperimentAction::List { json } => {
            return match Known::read(&cfg) {
                Ok(k) => match crate::control::listing::print(&k.list(), json) {
                    Ok(()) => ExitCode::SUCCESS,
                    Err(e) => console::exit_code("experiment list", &e),
                },
                Err(e) => {
                    eprintln!("apportion experiment list: {e}");
                    ExitCode::FAILURE
                }
            };
        }
        ExperimentAction::Define { file } => match std::fs::read_to_string(&file) {
            Ok(text) => Change::Define { text, json: file.extension().is_some_and(|x| x == "json") },
            Err(e) => {
                eprintln!("apportion experiment define: cannot read {}: {e}", file.display());
                return ExitCode::from(2);
            }
        },
        ExperimentAction::Freeze { id } => Change::Freeze(id),
        ExperimentAction::Resume { id } => Change::Resume(id),
        ExperimentAction::Conclude { id, winner } => Change::Conclude { experiment: id, winner },
        ExperimentAction::Retire { id } => Change::Retire(id),
    };
    if let Change::Define { text, json } = &change {
        if let Err(e) = command::precheck(text, *json, &cfg) {
            eprintln!("apportion experiment define: {e}");
            return ExitCode::from(2);
        }
    }
    let by = args.by.unwrap_or_else(command::os_user);
    let done = Known::read(&cfg)
        .and_then(|k| k.prepare(&change, &by, args.note.as_deref(), crate::clock::now_ms()))
        .and_then(|def| command::write(&cfg, &def).map(|()| def));
    match done {
        Ok(def) => {
            let winner = def.winner.as_deref().map(|w| format!(" to {w}")).unwrap_or_default();
            match sayln!(
                "{}: {}{winner}, revision {} (by {}); written to {}. The owning sidecar applies it at its next publish round.",
                def.experiment,
                def.state,
                def.revision,
                by,
                cfg.kafka.control_topic
            ) {
                Ok(()) => ExitCode::SUCCESS,
                Err(e) => console::exit_code("experiment", &e),
            }
        }
        Err(CommandError::Refused(m)) => {
            eprintln!("apportion experiment: {m}");
            ExitCode::from(2)
        }
        Err(e @ CommandError::Failed(_)) => {
            eprintln!("apportion experiment: {e}");
            ExitCode::FAILURE
        }
    }
}

/// Loads the configuration named on the command line, or the default file when it exists,
/// and says which it was.
pub fn load_config(path: Option<PathBuf>) -> Result<(Config, Source), ConfigError> {
    match path {
        Some(p) => Ok((Config::load(&p, true)?, Source::File(p))),
        None => {
            let default = Path::new(config::DEFAULT_PATH);
            let source = if default.exists() { Source::File(default.to_path_buf()) } else { Source::BuiltIn };
            Ok((Config::load(default, false)?, source))
        }
    }
}

fn run(path: Option<PathBuf>, signal: impl Future<Output = ()> + Send + 'static) -> ExitCode {
    let (cfg, source) = match load_config(path) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("apportion run: {e}");
            return ExitCode::from(2);
        }
    };
    crate::telemetry::init_logging(&cfg.log.format, &cfg.log.level);
    tracing::info!("{source}");
    tracing::info!("defaults: {}", first_sight(&cfg));
    let declared = cfg.resolved();
    if declared.is_empty() {
        tracing::info!("no declared experiments");
    }
    for r in declared {
        tracing::info!("experiment {r}");
    }
    for w in cfg.warnings() {
        tracing::warn!("{w}");
    }
    let runtime = match tokio::runtime::Runtime::new() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("apportion run: cannot start the async runtime: {e}");
            return ExitCode::FAILURE;
        }
    };
    let served = match Metrics::new() {
        Ok(m) => Served::new(Arc::new(m)),
        Err(e) => {
            eprintln!("apportion run: cannot register the metrics: {e}");
            return ExitCode::FAILURE;
        }
    };
    match runtime.block_on(crate::app::run(cfg, served, signal)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            tracing::error!("{e:#}");
            eprintln!("apportion run: {e:#}");
            ExitCode::FAILURE
        }
    }
}

fn check(path: Option<PathBuf>) -> ExitCode {
    let (cfg, source) = match load_config(path) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("apportion check: {e}");
            return ExitCode::from(2);
        }
    };
    match print_check(&cfg, &source) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => console::exit_code("check", &e),
    }
}

fn print_check(cfg: &Config, source: &Source) -> Result<(), Unwritable> {
    sayln!("{source}")?;
    sayln!("kafka: brokers {}, group {}", cfg.kafka.brokers, cfg.kafka.group_id)?;
    sayln!(
        "topics: input {}, weights {}, state {}, dead letters {}, control {}",
        cfg.kafka.input_topic, cfg.kafka.weights_topic, cfg.kafka.state_topic, cfg.kafka.dead_letter_topic, cfg.kafka.control_topic
    )?;
    for (k, v) in cfg.client_redacted() {
        sayln!("client: {k} = {v}")?;
    }
    sayln!(
        "publish every {}s (heartbeat {}s, min change {}), snapshot every {}s, metrics on {}",
        cfg.publish.interval_seconds,
        cfg.publish.heartbeat_seconds,
        cfg.publish.min_change,
        cfg.snapshot.interval_seconds,
        cfg.metrics.listen
    )?;
    sayln!("defaults: {}", first_sight(cfg))?;
    for r in cfg.resolved() {
        sayln!("experiment {r}")?;
    }
    for w in cfg.warnings() {
        sayln!("warning: {w}")?;
    }
    Ok(())
}

/// How experiments that were not declared are run.
fn first_sight(cfg: &Config) -> String {
    match cfg.resolve_default_spec() {
        Ok(spec) if cfg.defaults.auto_create => {
            ResolvedExperiment { id: "(created on first sight)".into(), arms: Vec::new(), spec }.to_string()
        }
        _ => "experiments must be declared (auto_create is off)".into(),
    }
}

fn simulate(args: SimulateArgs) -> ExitCode {
    let spec = SimSpec {
        arms: args.arms,
        reward: args.reward_max.map_or(RewardModel::Bernoulli, |max| RewardModel::Bounded { max }),
        policies: args.policies,
        horizon: args.horizon,
        runs: args.runs,
        batch: args.batch,
        seed: args.seed,
        threads: args.threads.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get())),
        timing: (args.reward_delay.is_some() || args.attribution_window.is_some()).then(|| sim::Timing {
            delay: args.reward_delay.unwrap_or(sim::Delay::Fixed { seconds: 0.0 }),
            rate_per_second: args.rate,
            attribution_window_seconds: args.attribution_window,
        }),
        settle: args.settle.then_some(sim::settle::Study {
            rule: Settle {
                best_probability: args.settle_best_probability,
                relative_loss: args.settle_relative_loss,
                min_pulls: args.settle_min_pulls,
                auto_conclude: false,
            },
            every: args.settle_every,
        }),
    };
    if let Err(e) = spec.validate().and_then(|()| args.plot.as_deref().map_or(Ok(()), sim::output::check_plot_path)) {
        eprintln!("apportion simulate: {e}");
        return ExitCode::from(2);
    }
    for p in &spec.policies {
        for w in p.warnings() {
            eprintln!("warning: {w}");
        }
    }
    let total = spec.policies.len() as u64 * spec.runs as u64;
    let bar = if std::io::stderr().is_terminal() { ProgressBar::new(total) } else { ProgressBar::hidden() };
    bar.set_style(
        ProgressStyle::with_template("{bar:40} {pos}/{len} runs · {elapsed} elapsed · about {eta} left")
            .unwrap_or_else(|_| ProgressStyle::default_bar()),
    );
    let report = sim::simulate(&spec, &|done| bar.set_position(done));
    bar.finish_and_clear();
    let report = match report {
        Ok(r) => r,
        Err(e) => {
            eprintln!("apportion simulate: {e}");
            return ExitCode::from(2);
        }
    };
    match print_simulation(&report, args.json, args.plot.as_deref()) {
        Ok(code) => code,
        Err(e) => console::exit_code("simulate", &e),
    }
}

fn print_simulation(report: &sim::SimReport, json: bool, plot: Option<&Path>) -> Result<ExitCode, Unwritable> {
    if json {
        match serde_json::to_string(report) {
            Ok(s) => sayln!("{s}")?,
            Err(e) => {
                eprintln!("apportion simulate: cannot write JSON: {e}");
                return Ok(ExitCode::FAILURE);
            }
        }
    } else {
        say!("{}", sim::output::table(report))?;
    }
    if let Some(path) = plot {
        if let Err(e) = sim::output::plot(report, path) {
            eprintln!("apportion simulate: {e}");
            return Ok(ExitCode::FAILURE);
        }
        if !json {
            sayln!("plot written to {}", path.display())?;
        }
    }
    Ok(ExitCode::SUCCESS)
}
