//! The command line as people meet it: configuration errors, `check`, and the demo.

mod common;

use common::binary as apportion;

/// A configuration file in a folder of its own, removed with the folder when dropped.
struct Scratch(std::path::PathBuf);

impl Scratch {
    fn path(&self) -> &std::path::Path {
        &self.0
    }
}

impl Drop for Scratch {
    fn drop(&mut self) {
        if let Some(dir) = self.0.parent() {
            let _ = std::fs::remove_dir_all(dir);
        }
    }
}

fn write_config(name: &str, text: &str) -> Scratch {
    let dir = std::env::temp_dir().join(format!("apportion-cli-{:016x}", rand::random::<u64>()));
    std::fs::create_dir_all(&dir).unwrap();
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    Scratch(p)
}

#[test]
fn each_configuration_error_exits_2_naming_the_key() {
    let cases = [
        ("[publish]\ninterval_seconds = -1\n", "publish.interval_seconds"),
        ("[publsh]\ninterval_seconds = 1\n", "publsh"),
        ("[kafka]\nbrokers = \"\"\n", "kafka.brokers"),
        ("[kafka]\ninput_topic = \"has space\"\n", "kafka.input_topic"),
        ("[metrics]\nlisten = \"nowhere\"\n", "metrics.listen"),
        ("[limits]\nduplicate_window = 0\n", "limits.duplicate_window"),
        ("[log]\nformat = \"xml\"\n", "log.format"),
        ("[defaults]\npolicy = { name = \"greedy\" }\n", "greedy"),
        ("[defaults]\npolicy = { name = \"ucb1\", c = 2 }\n", "c"),
        ("[defaults]\nbounds = { floor = 1.5 }\n", "floor"),
        ("[[experiments]]\nid = \"x\"\narms = [\"a\", \"b\", \"c\"]\nbounds = { floor = 0.4 }\n", "floor"),
        ("[[experiments]]\nid = \"x\"\narms = [\"a\"]\nbounds = { pinned = { zz = 0.5 } }\n", "pinned.zz"),
        ("[[experiments]]\nid = \"bad id\"\n", "experiments[0].id"),
        ("[[experiments]]\nid = \"x\"\nreward = { kind = \"bounded\", max = 0 }\n", "max"),
        ("[kafka.client]\n\"group.id\" = \"other\"\n", "group.id"),
        ("[log]\nlevel = \"loud\"\n", "log.level"),
        ("[defaults]\nattribution_window_seconds = 0\n", "attribution_window_seconds = 0"),
        ("[[experiments]]\nid = \"x\"\nattribution_window_seconds = -5\n", "attribution_window_seconds = -5"),
        ("[[experiments]]\nid = \"x\"\nbounds = { flor = 0.1 }\n", "`experiments[0].bounds`"),
        ("[[experiments]]\nid = \"x\"\narms = [\"a\", \"a\"]\n", "experiments[0].arms"),
        ("[defaults]\nsettle = { best_probability = 1.5 }\n", "settle.best_probability = 1.5"),
        ("[defaults]\nsettle = { relative_loss = 0 }\n", "settle.relative_loss = 0"),
        ("[[experiments]]\nid = \"x\"\nsettle = { min_pull = 3 }\n", "`experiments[0].settle`"),
        ("[[experiments]]\nid = \"x\"\narms = [\"a\", \"b\"]\ncontrol_arm = \"c\"\n", "experiments[0].control_arm (x) = \"c\""),
        (
            "[[experiments]]\nid = \"x\"\narms = [\"a\", \"b\"]\npolicy = { name = \"fixed\", weights = { a = 0.5, zz = 0.5 } }\n",
            "experiments[0].policy.weights.zz",
        ),
    ];
    for (text, key) in cases {
        let p = write_config("bad.toml", text);
        let out = apportion().args(["check", "--config"]).arg(p.path()).output().unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{text}: {err}");
        assert!(err.contains(key), "{text}: message does not name {key}: {err}");
    }
    let out = apportion().args(["check", "--config", "/nonexistent/apportion.toml"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2));
    let dir = std::env::temp_dir();
    let out = apportion().args(["check", "--config"]).arg(&dir).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("is a directory") && !err.contains("not found"), "{err}");
    let out = apportion().args(["run", "--config", "/nonexistent/apportion.toml"]).output().unwrap();
    assert_eq!(out.status.code(), Some(2), "run refuses before starting anything");
}

#[test]
fn an_environment_variable_overrides_a_key_and_is_checked_like_one() {
    let out = apportion().args(["check", "--config", "config/apportion.toml"]).env("APPORTION_KAFKA__BROKERS", "kafka-9:9092").output().unwrap();
    assert!(out.status.success());
    assert!(String::from_utf8_lossy(&out.stdout).contains("brokers kafka-9:9092"));
    let out = apportion()
        .args(["check", "--config", "config/apportion.toml"])
        .env("APPORTION_PUBLISH__INTERVAL_SECONDS", "soon")
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&out.stderr).contains("publish.interval_seconds"));
}

#[test]
fn check_prints_the_resolved_experiments_and_never_a_secret() {
    let p = write_config(
        "secret.toml",
        "[kafka.client]\n\"security.protocol\" = \"SASL_SSL\"\n\"sasl.password\" = \"pw-in-file-7731\"\n\"ssl.key.password\" = \"pw-key-5521\"\n",
    );
    let out = apportion()
        .args(["check", "--config"])
        .arg(p.path())
        .env("APPORTION_KAFKA__CLIENT__SASL_USERNAME", "svc")
        .output()
        .unwrap();
    let text = format!("{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    assert!(out.status.success(), "{text}");
    assert!(!text.contains("pw-in-file-7731") && !text.contains("pw-key-5521"), "{text}");
    assert!(text.contains("sasl.password = <redacted>") && text.contains("sasl.username = svc"), "{text}");
    let out = apportion().args(["check", "--config", "config/apportion.toml"]).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(text.contains("experiment homepage-hero") && text.contains("control pinned at 0.2"), "{text}");
}

/// The demo's summary, one line per arm: its hidden true mean, then the matured estimate and
/// its 95 % interval.
fn summary_arms(text: &str) -> Vec<(String, f64, f64, f64, f64)> {
    let number = |s: &str| s.trim_matches(|c: char| c == '[' || c == ']' || c == ',').parse::<f64>().ok();
    text.lines()
        .filter(|l| l.contains("true mean") && l.contains("estimate"))
        .map(|l| {
            let w: Vec<&str> = l.split_whitespace().collect();
            let at = |word: &str| w.iter().position(|x| *x == word).unwrap_or_else(|| panic!("no {word:?} in {l:?}"));
            let (t, e) = (at("mean") + 1, at("estimate") + 1);
            let v = |i: usize| number(w[i]).unwrap_or_else(|| panic!("no number at {i} in {l:?}"));
            (w[0].to_string(), v(t), v(e), v(e + 1), v(e + 2))
        })
        .collect()
}

#[test]
fn the_demo_finds_every_best_arm_and_its_matured_intervals_hold_the_hidden_truths() {
    let out = apportion().args(["demo", "--seconds", "60", "--seed", "7"]).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{text}{}", String::from_utf8_lossy(&out.stderr));
    // The demo's own scenario (config/demo.toml, src/demo/scenario.rs) has three experiments
    // and ten arms.
    assert_eq!(text.matches("— found").count(), 3, "{text}");
    let arms = summary_arms(&text);
    assert_eq!(arms.len(), 10, "{text}");
    // Ten 95 % intervals all hold their truth only about 60 % of the time (0.95¹⁰), so the
    // check is familywise: each interval is widened from z = 1.960 to z = 2.807, the two-sided
    // 99.5 % normal quantile (Bonferroni over ten arms; scipy.stats.norm.ppf(0.9975) =
    // 2.8070, from memory), and every truth must lie inside. The demo's table shows the 95 %
    // intervals themselves.
    let widen = 2.807 / 1.960;
    for (arm, truth, mean, low, high) in &arms {
        let (lo, hi) = (mean - (mean - low) * widen, mean + (high - mean) * widen);
        assert!(lo <= *truth && *truth <= hi, "{arm}: truth {truth} outside [{lo}, {hi}] (95 %: [{low}, {high}])\n{text}");
    }
    let covered = arms.iter().filter(|(_, t, _, lo, hi)| lo <= t && t <= hi).count();
    println!("95 % intervals holding their truth: {covered} of 10");
}

/// Runs the command with stdout a pipe whose reading end is closed before anything is written.
fn run_into_closed_pipe(args: &[&str]) -> std::process::Output {
    let mut child = apportion()
        .args(args)
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    drop(child.stdout.take());
    child.wait_with_output().unwrap()
}

#[test]
fn a_closed_stdout_ends_each_printing_command_quietly() {
    let sim = ["simulate", "--arms", "0.05,0.04", "--policies", "ucb1", "--horizon", "200", "--runs", "2"];
    let sim_json = [&sim[..], &["--json"]].concat();
    let check = ["check", "--config", "config/apportion.toml"];
    for args in [&sim[..], &sim_json[..], &check[..]] {
        let out = run_into_closed_pipe(args);
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(0), "{args:?}: {err}");
        assert!(!err.contains("panicked") && !err.contains("Broken pipe"), "{args:?}: {err}");
    }
}

/// A loopback port nothing listens on: bound, then closed.
fn closed_port() -> u16 {
    let l = std::net::TcpListener::bind("127.0.0.1:0").unwrap();
    l.local_addr().unwrap().port()
}

/// What `run` logs on stderr (a pipe) until a line contains `until`, or a minute has passed;
/// then the process is killed. The broker is unreachable, which `run` survives by retrying.
fn startup_log(config_text: &str, until: &str) -> String {
    use std::io::BufRead;
    let p = write_config("run.toml", config_text);
    let mut child = apportion()
        .args(["run", "--config"])
        .arg(p.path())
        .env("APPORTION_KAFKA__BROKERS", format!("127.0.0.1:{}", closed_port()))
        .env("APPORTION_METRICS__LISTEN", "127.0.0.1:0")
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let stderr = child.stderr.take().unwrap();
    let (tx, rx) = std::sync::mpsc::channel();
    std::thread::spawn(move || {
        for line in std::io::BufReader::new(stderr).lines().map_while(Result::ok) {
            if tx.send(line).is_err() {
                break;
            }
        }
    });
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    let mut text = String::new();
    while let Some(left) = deadline.checked_duration_since(std::time::Instant::now()) {
        match rx.recv_timeout(left) {
            Ok(line) => {
                text.push_str(&line);
                text.push('\n');
                if line.contains(until) {
                    break;
                }
            }
            Err(_) => break,
        }
    }
    let _ = child.kill();
    let _ = child.wait();
    text
}

#[test]
fn a_log_level_that_is_no_filter_exits_2_naming_key_value_and_the_valid_levels() {
    let p = write_config("loud.toml", "[log]\nlevel = \"loud\"\n");
    for cmd in ["check", "run"] {
        let out = apportion().args([cmd, "--config"]).arg(p.path()).output().unwrap();
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{cmd}: {err}");
        assert!(err.contains("log.level") && err.contains("\"loud\"") && err.contains("debug, info, warn"), "{cmd}: {err}");
    }
}

#[test]
fn text_logs_into_a_pipe_carry_no_colour_codes() {
    let log = startup_log("[log]\nlevel = \"info\"\n", "metrics on");
    assert!(log.contains("metrics on"), "{log}");
    assert!(!log.contains('\u{1b}'), "{log:?}");
}

#[test]
fn check_says_which_configuration_file_it_read_or_that_it_used_the_defaults() {
    let out = apportion().args(["check", "--config", "config/apportion.toml"]).output().unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success() && text.contains("configuration: config/apportion.toml"), "{text}");
    let empty = std::env::temp_dir().join(format!("apportion-cli-{:016x}", rand::random::<u64>()));
    std::fs::create_dir_all(&empty).unwrap();
    let out = apportion().arg("check").current_dir(&empty).output().unwrap();
    let _ = std::fs::remove_dir_all(&empty);
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success() && text.contains("no configuration file") && text.contains("built-in defaults"), "{text}");
}

#[test]
fn run_logs_its_configuration_file_and_the_declared_experiments_at_start() {
    let log = startup_log(
        "[[experiments]]\nid = \"hero\"\narms = [\"a\", \"b\"]\n\n[[experiments]]\nid = \"ranker\"\narms = [\"x\", \"y\"]\n",
        "metrics on",
    );
    assert!(log.contains("configuration: ") && log.contains("run.toml"), "{log}");
    assert!(log.contains("experiment hero") && log.contains("experiment ranker"), "{log}");
}

#[test]
fn an_unknown_policy_name_lists_the_valid_names() {
    let p = write_config("softmax.toml", "[[experiments]]\nid = \"x\"\npolicy = { name = \"softmax\" }\n");
    let out = apportion().args(["check", "--config"]).arg(p.path()).output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("\"softmax\"") && err.contains("experiments[0].policy.name"), "{err}");
    assert!(apportion::core::PolicyName::ALL.iter().all(|n| err.contains(n.as_str())), "{err}");
    assert!(!err.contains("variant constructor"), "{err}");
}

#[test]
fn a_plot_file_other_than_svg_is_refused_before_simulating() {
    let dir = std::env::temp_dir().join(format!("apportion-cli-{:016x}", rand::random::<u64>()));
    std::fs::create_dir_all(&dir).unwrap();
    let png = dir.join("regret.png");
    let out = apportion()
        .args(["simulate", "--arms", "0.05,0.04", "--policies", "ucb1", "--horizon", "100", "--runs", "1", "--plot"])
        .arg(&png)
        .output()
        .unwrap();
    let written = png.exists();
    let _ = std::fs::remove_dir_all(&dir);
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{err}");
    assert!(err.contains("regret.png") && err.contains(".svg") && !written, "{err}");
}

#[test]
fn the_demo_with_an_unreachable_broker_fails_with_one_message_naming_it() {
    let address = format!("127.0.0.1:{}", closed_port());
    let mut child = apportion()
        .args(["demo", "--seconds", "30", "--brokers", &address])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let deadline = std::time::Instant::now() + std::time::Duration::from_secs(60);
    while child.try_wait().unwrap().is_none() && std::time::Instant::now() < deadline {
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    let _ = child.kill();
    let out = child.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    let said = format!("{}{err}", String::from_utf8_lossy(&out.stdout));
    assert!(!out.status.success() && out.status.code().is_some(), "ended by itself with a failure: {said}");
    assert!(err.contains(&address), "{said}");
    assert!(!String::from_utf8_lossy(&out.stdout).contains("an in-process broker"), "{said}");
    assert_eq!(err.lines().filter(|l| !l.trim().is_empty()).count(), 1, "one message: {said}");
}

/// `guardrails` was renamed `bounds` (the trade keeps "guardrail" for metrics that must not get
/// worse): the old key is still read for one release, with a warning naming the new one; both
/// names at once are refused with status 2.
#[test]
fn the_old_key_guardrails_is_read_with_a_warning_naming_bounds() {
    let old = write_config(
        "old.toml",
        "[defaults]\nguardrails = { floor = 0.03 }\n\n[[experiments]]\nid = \"x\"\narms = [\"a\", \"b\"]\nguardrails = { floor = 0.2 }\n",
    );
    let out = apportion().args(["check", "--config"]).arg(old.path()).output().unwrap();
    let text = format!("{}{}", String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
    assert!(out.status.success(), "{text}");
    assert!(text.contains("defaults.guardrails is the old name of defaults.bounds"), "{text}");
    assert!(text.contains("experiments[0].guardrails is the old name of experiments[0].bounds"), "{text}");
    assert!(text.contains("x: policy") && text.contains("floor 0.2"), "the old key takes effect: {text}");
    let both = write_config("both.toml", "[[experiments]]\nid = \"x\"\nbounds = { floor = 0.1 }\nguardrails = { floor = 0.2 }\n");
    let out = apportion().args(["check", "--config"]).arg(both.path()).output().unwrap();
    let text = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(2), "{text}");
    assert!(text.contains("experiments[0].bounds and experiments[0].guardrails"), "{text}");
}

#[test]
fn a_definition_file_that_fails_the_checks_exits_2_before_any_broker_is_asked() {
    let broker = format!("127.0.0.1:{}", closed_port());
    let config = write_config("apportion.toml", &format!("[kafka]\nbrokers = \"{broker}\"\n"));
    let cases = [
        ("experiment = \"x\"\narms = [\"a\", \"b\"]\n[bounds]\nfloor = 0.7\n", "floor = 0.7 cannot hold"),
        ("experiment = \"x\"\narms = [\"a\"]\nstate = \"concluded\"\n", "needs a winner"),
        ("experiment = \"x\"\nstate = \"paused\"\n", "paused"),
        ("experiment = \"x\"\narms = [\"a\"]\ncolour = \"red\"\n", "colour"),
    ];
    for (text, expected) in cases {
        let file = write_config("def.toml", text);
        let out = apportion().args(["experiment", "define"]).arg(file.path()).arg("--config").arg(config.path()).output().expect("runs");
        let err = String::from_utf8_lossy(&out.stderr);
        assert_eq!(out.status.code(), Some(2), "{text}: {err}");
        assert!(err.contains(expected) && !err.contains(&broker), "{expected:?} in {err:?}, and no broker asked");
    }
}

#[test]
fn an_experiment_command_with_an_unreachable_broker_exits_1_naming_it() {
    let broker = format!("127.0.0.1:{}", closed_port());
    let config = write_config("apportion.toml", &format!("[kafka]\nbrokers = \"{broker}\"\n"));
    let out = apportion().args(["experiment", "freeze", "thumb-style", "--config"]).arg(config.path()).output().expect("runs");
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(err.contains(&broker) && err.lines().count() == 1, "one line naming the broker: {err:?}");
}
