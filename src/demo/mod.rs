//! `apportion demo`: an in-process Kafka-protocol broker (librdkafka's mock cluster), traffic
//! for a fictional recipe-video app, the sidecar with its metrics endpoint, and a live table.

mod scenario;
mod traffic;

use std::collections::BTreeMap;
use std::future::Future;
use std::io::IsTerminal;
use std::process::ExitCode;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

use rdkafka::config::RDKafkaLogLevel;
use rdkafka::consumer::{BaseConsumer, Consumer, ConsumerContext};
use rdkafka::error::KafkaError;
use rdkafka::mocking::MockCluster;
use rdkafka::ClientContext;

use crate::config::Config;
use crate::{say, sayln};
use crate::shutdown::Shutdown;
use crate::telemetry::http::Served;
use crate::telemetry::table::ExperimentRow;
use crate::telemetry::Metrics;
use scenario::{best_arm, WORLD};
use traffic::Traffic;

const DEMO_CONFIG: &str = include_str!("../../config/demo.toml");

#[derive(clap::Args, Debug)]
pub struct DemoArgs {
    /// Stop after this many seconds and print a summary (default: run until Ctrl-C).
    #[arg(long)]
    pub seconds: Option<u64>,
    /// Seed of the traffic generator.
    #[arg(long, default_value_t = 7)]
    pub seed: u64,
    /// Impressions per second.
    #[arg(long, default_value_t = 1500.0)]
    pub rate: f64,
    /// Use this broker (host:port) instead of the in-process one.
    #[arg(long)]
    pub brokers: Option<String>,
    /// Only generate traffic (to a broker given with --brokers); no sidecar, no table.
    #[arg(long, requires = "brokers")]
    pub generator_only: bool,
}

/// Runs the demo until `--seconds` pass or `signal` completes.
pub fn main(args: DemoArgs, signal: impl Future<Output = ()> + Send + 'static) -> ExitCode {
    let runtime = match tokio::runtime::Runtime::new() {
        Ok(r) => r,
        Err(e) => {
            eprintln!("apportion demo: cannot start the async runtime: {e}");
            return ExitCode::FAILURE;
        }
    };
    match runtime.block_on(demo(args, signal)) {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) if crate::console::is_closed(&e) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("apportion demo: {e:#}");
            ExitCode::FAILURE
        }
    }
}

async fn demo(args: DemoArgs, signal: impl Future<Output = ()> + Send + 'static) -> anyhow::Result<()> {
    let mut cfg = Config::from_toml(DEMO_CONFIG, "config/demo.toml").map_err(|e| anyhow::anyhow!(e))?;
    crate::telemetry::init_logging(&cfg.log.format, &cfg.log.level);
    let mock = match &args.brokers {
        Some(b) => {
            cfg.kafka.brokers = b.clone();
            let probe = cfg.client_config();
            let brokers = b.clone();
            tokio::task::spawn_blocking(move || reachable(probe, &brokers)).await??;
            None
        }
        None => {
            let m = MockCluster::new(1)?;
            cfg.kafka.brokers = m.bootstrap_servers();
            for t in [&cfg.kafka.input_topic, &cfg.kafka.weights_topic, &cfg.kafka.state_topic, &cfg.kafka.dead_letter_topic] {
                m.create_topic(t, cfg.kafka.topic_partitions, 1)?;
            }
            m.create_topic(&cfg.kafka.control_topic, 1, 1)?;
            Some(m)
        }
    };
    let shutdown = Shutdown::new();
    {
        let shutdown = shutdown.clone();
        tokio::spawn(async move {
            signal.await;
            shutdown.trigger();
        });
    }
    let stop = Arc::new(AtomicBool::new(false));
    let produced = Arc::new(AtomicU64::new(0));
    let traffic = Traffic {
        brokers: cfg.kafka.brokers.clone(),
        input_topic: cfg.kafka.input_topic.clone(),
        weights_topic: cfg.kafka.weights_topic.clone(),
        rate: args.rate,
        seed: args.seed,
        stop: stop.clone(),
        produced: produced.clone(),
    };
    let generator = std::thread::spawn(move || traffic.run());
    let deadline = args.seconds.map(|s| Instant::now() + Duration::from_secs(s));

    if args.generator_only {
        sayln!("generating {} impressions/s for Simmer into {} on {}", args.rate, cfg.kafka.input_topic, cfg.kafka.brokers)?;
        wait(&shutdown, deadline).await;
        stop.store(true, Ordering::SeqCst);
        generator.join().map_err(|_| anyhow::anyhow!("the traffic generator panicked"))??;
        sayln!("{} events produced", produced.load(Ordering::Relaxed))?;
        return Ok(());
    }

    let served = Served::new(Arc::new(Metrics::new()?));
    if std::net::TcpListener::bind(&cfg.metrics.listen).is_err() {
        cfg.metrics.listen = "127.0.0.1:0".into();
    }
    let sidecar = tokio::spawn(crate::app::run(cfg.clone(), served.clone(), shutdown.triggered()));
    let broker = match &args.brokers {
        Some(b) => format!("the broker at {b}"),
        None => "an in-process broker".into(),
    };
    sayln!("Simmer demo: {broker}, traffic at {} impressions/s, the sidecar (metrics on {}).", args.rate, cfg.metrics.listen)?;
    let live = std::io::stdout().is_terminal();
    let started = Instant::now();
    let mut last_print = Instant::now();
    // The figures as last seen while the sidecar held its experiments: Ctrl-C stops the sidecar
    // at once, and it hands its experiments back as it stops.
    let mut last_seen: Option<(String, String)> = None;
    // A closed stdout stops the demo like Ctrl-C does, and ends it quietly.
    let mut unprintable = None;
    let holds_experiments = |served: &Served| served.table.read().map(|t| !t.rows.is_empty()).unwrap_or(false);
    loop {
        tokio::select! {
            _ = tokio::time::sleep(Duration::from_secs(1)) => {},
            _ = shutdown.wait() => {},
        }
        if shutdown.is_triggered() || deadline.is_some_and(|d| Instant::now() >= d) || sidecar.is_finished() {
            break;
        }
        if holds_experiments(&served) {
            last_seen = Some((render(&served, started.elapsed(), produced.load(Ordering::Relaxed)), summary(&served)));
        }
        let printed = if live {
            say!("\x1b[2J\x1b[H{}", render(&served, started.elapsed(), produced.load(Ordering::Relaxed)))
        } else if last_print.elapsed() >= Duration::from_secs(5) {
            last_print = Instant::now();
            sayln!("{:>4}s  {} events produced", started.elapsed().as_secs(), produced.load(Ordering::Relaxed))
        } else {
            Ok(())
        };
        if let Err(e) = printed {
            unprintable = Some(e);
            break;
        }
    }
    stop.store(true, Ordering::SeqCst);
    generator.join().map_err(|_| anyhow::anyhow!("the traffic generator panicked"))??;
    // The last events in flight are applied and published within a publish interval or two;
    // the figures are read then, while the sidecar still holds its experiments.
    if !sidecar.is_finished() {
        tokio::time::sleep(Duration::from_millis(1500)).await;
    }
    let (table, outcome) = match (holds_experiments(&served), last_seen) {
        (false, Some(seen)) => seen,
        _ => (render(&served, started.elapsed(), produced.load(Ordering::Relaxed)), summary(&served)),
    };
    shutdown.trigger();
    sidecar.await??;
    if let Some(e) = unprintable {
        return Err(e.into());
    }
    sayln!("{table}")?;
    sayln!("{outcome}")?;
    drop(mock);
    Ok(())
}

/// How long the demo waits for a broker given with `--brokers` to answer.
const PROBE_TIMEOUT: Duration = Duration::from_secs(5);

/// Keeps librdkafka's own reports out of the log while probing: the probe's one message says
/// what went wrong, where a retrying client would log every failed connection.
struct Quiet;

impl ClientContext for Quiet {
    fn log(&self, _: RDKafkaLogLevel, _: &str, _: &str) {}
    fn error(&self, _: KafkaError, _: &str) {}
}

impl ConsumerContext for Quiet {}

/// Fails at once, naming the address, when the broker given with `--brokers` does not answer a
/// metadata request: unlike `run`, which waits for its broker, the demo is run by hand.
fn reachable(config: rdkafka::ClientConfig, brokers: &str) -> anyhow::Result<()> {
    let client: BaseConsumer<Quiet> = config
        .create_with_context(Quiet)
        .map_err(|e| anyhow::anyhow!("cannot create a client for the broker at {brokers}: {e}"))?;
    client.fetch_metadata(None, PROBE_TIMEOUT).map(|_| ()).map_err(|e| {
        anyhow::anyhow!(
            "no Kafka broker answered at {brokers} within {} s ({e}); start one there, or leave out --brokers to use the demo's in-process broker",
            PROBE_TIMEOUT.as_secs()
        )
    })
}

async fn wait(shutdown: &Shutdown, deadline: Option<Instant>) {
    match deadline {
        Some(d) => {
            tokio::select! {
                _ = tokio::time::sleep_until(d.into()) => {},
                _ = shutdown.wait() => {},
            }
        }
        None => shutdown.wait().await,
    }
}

/// The experiments the sidecar serves, as of its last publish round.
fn rows(served: &Served) -> BTreeMap<String, ExperimentRow> {
    served.table.read().map(|t| t.rows.clone()).unwrap_or_default()
}

/// The unit of an experiment's rewards, from the scenario.
fn unit(experiment: &str) -> &'static str {
    WORLD.iter().find(|t| t.experiment == experiment).map_or("reward units", |t| t.unit)
}

/// The live table: experiment, arm, pulls (and those pending), mean and confidence sequence,
/// probability of best, weight; per experiment whether it is settled and the expected loss of
/// choosing its leader now.
fn render(served: &Served, elapsed: Duration, produced: u64) -> String {
    let mut s = format!("Simmer · {:>4}s · {produced} events produced\n\n", elapsed.as_secs());
    s += &format!(
        "{:<13} {:<15} {:>7} {:>7} {:>26} {:>7} {:>6} {:>7} {:>9}\n",
        "experiment", "arm", "pulls", "pending", "mean [95% sequence]", "P(best)", "weight", "settled", "exp. loss"
    );
    for (id, e) in rows(served) {
        for (i, a) in e.arms.iter().enumerate() {
            let lead = if e.leader == Some(i) { "*" } else { " " };
            let (settled, loss) = if i == 0 { (if e.settled { "yes" } else { "no" }, if e.expected_loss < 5e-6 { "<0.00001".into() } else { format!("{:.5}", e.expected_loss) }) } else { ("", String::new()) };
            s += &format!(
                "{:<13} {lead}{:<14} {:>7} {:>7} {:>26} {:>7.3} {:>6} {:>7} {:>9}\n",
                if i == 0 { id.as_str() } else { "" },
                a.name,
                a.figures.pulls,
                a.figures.pending_pulls,
                format!("{:.4} [{:.4}, {:.4}]", a.figures.mean, a.figures.cs_low, a.figures.cs_high),
                a.figures.best_probability,
                a.weight.map_or("-".into(), |w| format!("{:.3}", w)),
                settled,
                loss,
            );
        }
        let unit = unit(&id);
        s += &format!(
            "{:<13} means and expected loss in {unit} per impression; policy {}, weights version {}, regret estimate {:.1} {unit}\n\n",
            "", e.policy, e.version, e.regret_estimate
        );
    }
    s += "* leader (highest estimated mean) · pending: impressions younger than the attribution window, not yet in the mean\n";
    s += "sequence: holds at every refresh, for all arms together · settled: P(best) and expected loss meet the experiment's settle rule\n";
    s
}

/// Where the traffic went, against the truth the sidecar never saw.
fn summary(served: &Served) -> String {
    let rows = rows(served);
    let mut s = String::from("Summary: where the traffic went\n");
    for t in WORLD {
        let Some(e) = rows.get(t.experiment) else {
            s += &format!("  {}: no events applied\n", t.experiment);
            continue;
        };
        let total: u64 = e.arms.iter().map(|a| a.figures.pulls).sum::<u64>().max(1);
        let heaviest = e
            .arms
            .iter()
            .max_by(|a, b| a.weight.unwrap_or(0.0).total_cmp(&b.weight.unwrap_or(0.0)))
            .map_or("-", |a| a.name.as_str());
        let best = best_arm(t);
        s += &format!(
            "  {}: best arm {best} (hidden truth); largest weight now on {heaviest} — {}; regret estimate {:.1} {}\n",
            t.experiment,
            if heaviest == best { "found" } else { "not yet" },
            e.regret_estimate,
            t.unit,
        );
        for (arm, truth) in t.arms {
            let a = e.arms.iter().find(|a| a.name == *arm);
            let estimate = a.map_or("no pulls".into(), |a| {
                let f = &a.figures;
                let verdict = if f.ci_low <= *truth && *truth <= f.ci_high { "covers" } else { "misses" };
                format!("estimate {:.4} [{:.4}, {:.4}] {verdict}", f.mean, f.ci_low, f.ci_high)
            });
            s += &format!(
                "    {:<14} true mean {:>7} {}/impression · {estimate} · {:>5.1}% of traffic · weight {}\n",
                arm,
                truth,
                t.unit,
                100.0 * a.map_or(0, |a| a.figures.pulls) as f64 / total as f64,
                a.and_then(|a| a.weight).map_or("-".into(), |w| format!("{w:.3}"))
            );
        }
    }
    s
}
