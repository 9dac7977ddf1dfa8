//! The sidecar as a child process of its own binary, so that its memory, its output and its
//! death (SIGKILL) are its own; and the configuration files such processes read.

use std::fs;
use std::path::PathBuf;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use super::{free_port, http_get, unique, wait_until};

/// The binary under test, with none of the caller's `APPORTION_*` variables (the sidecar reads
/// each one as a configuration override and rejects unknown ones).
pub fn binary() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_apportion"));
    for (k, _) in std::env::vars() {
        if k.starts_with("APPORTION_") {
            c.env_remove(k);
        }
    }
    c
}

/// A sidecar configuration with its own topics and group, as TOML for child processes.
pub struct ProcConfig {
    pub id: String,
    pub brokers: String,
    pub partitions: i32,
    /// Metrics port of the first instance; others take their own.
    pub port: u16,
    /// Consumer session timeout. Short by default so that a killed instance's partitions move
    /// on quickly; longer than any broker pause a test makes, so the pause does not expire it.
    pub session_timeout_ms: u32,
    /// `max.poll.interval.ms`, when set: also the member's rebalance timeout, for which a
    /// broker may hold a rebalance open while a member is gone (tansu 0.6 does).
    pub max_poll_interval_ms: Option<u32>,
    /// `log.level` of [`ProcConfig::toml`].
    pub log_level: &'static str,
    /// More TOML, appended to [`ProcConfig::toml`].
    pub extra: String,
}

impl ProcConfig {
    pub fn new(name: &str, brokers: &str, partitions: i32) -> Self {
        ProcConfig {
            id: unique(name),
            brokers: brokers.to_string(),
            partitions,
            port: free_port(),
            session_timeout_ms: 6000,
            max_poll_interval_ms: None,
            log_level: "warn",
            extra: String::new(),
        }
    }

    pub fn topic(&self, which: &str) -> String {
        format!("{}.{which}", self.id)
    }

    /// The `[kafka]` and `[metrics]` tables only (metrics on `port`), then `sections` as is.
    pub fn bare_toml(&self, port: u16, sections: &str) -> String {
        format!(
            "[kafka]\nbrokers = \"{brokers}\"\ngroup_id = \"{id}.group\"\ninput_topic = \"{id}.events\"\n\
             weights_topic = \"{id}.weights\"\nstate_topic = \"{id}.state\"\ndead_letter_topic = \"{id}.dead-letter\"\n\
             control_topic = \"{id}.control\"\n\
             topic_partitions = {partitions}\n\n[metrics]\nlisten = \"127.0.0.1:{port}\"\n\n{sections}\n",
            brokers = self.brokers,
            id = self.id,
            partitions = self.partitions,
        )
    }

    /// A configuration for fault tests: the session settings above, publishing every 0.2 s,
    /// snapshots every 0.5 s, logging at `log_level`, then [`ProcConfig::extra`].
    pub fn toml(&self, port: u16) -> String {
        let max_poll = self.max_poll_interval_ms.map(|ms| format!(r#""max.poll.interval.ms" = "{ms}""#)).unwrap_or_default();
        self.bare_toml(
            port,
            &format!(
                "[kafka.client]\n\"session.timeout.ms\" = \"{session}\"\n\"heartbeat.interval.ms\" = \"{heartbeat}\"\n{max_poll}\n\n\
                 [publish]\ninterval_seconds = 0.2\nheartbeat_seconds = 5\n\n[snapshot]\ninterval_seconds = 0.5\n\n\
                 [log]\nlevel = \"{level}\"\n{extra}",
                level = self.log_level,
                session = self.session_timeout_ms,
                heartbeat = (self.session_timeout_ms / 6).max(500),
                extra = self.extra,
            ),
        )
    }

    /// An instance on [`ProcConfig::toml`] with its metrics on `port`.
    pub fn start(&self, port: u16) -> SidecarProcess {
        SidecarProcess::start(&self.toml(port), port, &[])
    }
}

/// The sidecar's binary as a child process, its configuration and output in a folder of its own.
/// Should the test fail while it lives, the end of its output is printed.
pub struct SidecarProcess {
    pub addr: String,
    pub child: Child,
    dir: PathBuf,
}

impl SidecarProcess {
    /// `apportion run` on configuration text `toml` (metrics on `port`), with `env` added.
    pub fn start(toml: &str, port: u16, env: &[(&str, &str)]) -> SidecarProcess {
        let dir = std::env::temp_dir().join(unique("apportion-test"));
        fs::create_dir_all(&dir).expect("temp folder");
        let config = dir.join("apportion.toml");
        fs::write(&config, toml).expect("config written");
        let child = binary()
            .args(["run", "--config"])
            .arg(&config)
            .envs(env.iter().copied())
            .stdin(Stdio::null())
            .stdout(fs::File::create(dir.join("stdout")).expect("stdout file"))
            .stderr(fs::File::create(dir.join("stderr")).expect("stderr file"))
            .spawn()
            .expect("sidecar started");
        SidecarProcess { addr: format!("127.0.0.1:{port}"), child, dir }
    }

    pub fn config_path(&self) -> PathBuf {
        self.dir.join("apportion.toml")
    }

    pub fn alive(&mut self) -> bool {
        matches!(self.child.try_wait(), Ok(None))
    }

    /// (status, body); (0, "") when it does not answer.
    pub fn get(&self, path: &str) -> (u16, String) {
        http_get(&self.addr, path).unwrap_or((0, String::new()))
    }

    /// Waits until `/readyz` answers 200; false when the process exits or time is up.
    pub fn wait_ready(&mut self, within: Duration) -> bool {
        let addr = self.addr.clone();
        let child = &mut self.child;
        wait_until(within, || !matches!(child.try_wait(), Ok(None)) || http_get(&addr, "/readyz").is_ok_and(|r| r.0 == 200));
        self.alive() && self.get("/readyz").0 == 200
    }

    /// [`SidecarProcess::wait_ready`], failing the test with the output when not ready.
    pub fn assert_ready(&mut self, within: Duration) {
        let ok = self.wait_ready(within);
        assert!(ok, "sidecar on {} not ready within {within:?}; output:\n{}", self.addr, self.output());
    }

    /// `VmHWM` (peak resident set) and `VmRSS` of the child, in kB.
    pub fn memory_kb(&self) -> (u64, u64) {
        let status = fs::read_to_string(format!("/proc/{}/status", self.child.id())).unwrap_or_default();
        let field = |name: &str| {
            status
                .lines()
                .find_map(|l| l.strip_prefix(name)?.trim().strip_suffix("kB")?.trim().parse().ok())
                .unwrap_or(0)
        };
        (field("VmHWM:"), field("VmRSS:"))
    }

    /// SIGKILL: no snapshot, no goodbye.
    pub fn crash(mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }

    /// SIGTERM, then a bounded wait (60 s). True for a clean exit.
    pub fn stop(&mut self) -> bool {
        if let Ok(Some(status)) = self.child.try_wait() {
            return status.success();
        }
        signal(self.child.id(), "TERM");
        let deadline = Instant::now() + Duration::from_secs(60);
        while Instant::now() < deadline {
            if let Ok(Some(status)) = self.child.try_wait() {
                return status.success();
            }
            std::thread::sleep(Duration::from_millis(100));
        }
        let _ = self.child.kill();
        let _ = self.child.wait();
        false
    }

    /// The first lines of the output that report a warning or an error.
    pub fn complaints(&self) -> String {
        let out = self.output();
        let lines: Vec<&str> = out.lines().filter(|l| l.contains("WARN") || l.contains("ERROR") || l.contains("panicked")).take(20).collect();
        lines.join("\n")
    }

    pub fn output(&self) -> String {
        let read = |f: &str| String::from_utf8_lossy(&fs::read(self.dir.join(f)).unwrap_or_default()).to_string();
        format!("{}{}", read("stdout"), read("stderr"))
    }
}

impl Drop for SidecarProcess {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
        if std::thread::panicking() {
            let out = self.output();
            let tail: Vec<&str> = out.lines().rev().take(40).collect();
            eprintln!("last lines of the sidecar on {}:", self.addr);
            for line in tail.iter().rev() {
                eprintln!("  {line}");
            }
        }
        let _ = fs::remove_dir_all(&self.dir);
    }
}

/// Sends a signal (TERM, KILL, STOP, CONT) to a process with the system's `kill`.
pub fn signal(pid: u32, name: &str) {
    let _ = Command::new("kill").arg(format!("-{name}")).arg(pid.to_string()).stderr(Stdio::null()).status();
}
