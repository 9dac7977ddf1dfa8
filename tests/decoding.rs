//! Hostile input where events and snapshots are read: arbitrary and mutated bytes, hostile
//! JSON, and the committed corpus in `tests/corpus/` (each file with its expected outcome in
//! the folder's `expected.txt`). The decoders are fuzzed with a bounded number of cases so that
//! the run fits in CI; the fast path is checked against serde_json, the reference reader.

use std::collections::BTreeMap;
use std::fs;
use std::path::{Path, PathBuf};

use apportion::core::{Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel};
use apportion::event::{self, valid_name, Kind, Reason};
use apportion::stream::recent::DedupWindow;
use apportion::stream::snapshot::{self, Counters, Snapshot};
use proptest::prelude::*;
use proptest::test_runner::{Config as ProptestConfig, TestRunner};
use serde_json::Value;

/// Decoding settings of the corpus and the fuzz cases: the code's defaults for
/// `limits.max_event_bytes` (16 384) and `limits.max_clock_skew_seconds` (300).
const MAX_BYTES: usize = 16_384;
const SKEW_MS: i64 = 300_000;
/// "Now" for decoding: ten seconds after the contract's example event.
const NOW: i64 = 1_764_547_210_000;

fn corpus(dir: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/corpus").join(dir)
}

/// A proptest run with a bounded number of cases and a bounded shrink, writing no files.
fn runner(cases: u32) -> TestRunner {
    TestRunner::new(ProptestConfig {
        cases,
        failure_persistence: None,
        max_shrink_iters: 2_000,
        max_shrink_time: 60_000,
        ..ProptestConfig::default()
    })
}

/// What must hold of every decoding outcome, whatever the input.
fn decode_holds_its_contract(bytes: &[u8]) -> Result<(), TestCaseError> {
    // The fast path for plain events reads exactly what serde_json reads, or leaves the bytes to it.
    if let Err(e) = event::fast_path_agrees(bytes) {
        return Err(TestCaseError::fail(format!("{e}: {:?}", String::from_utf8_lossy(bytes))));
    }
    let first = event::decode(bytes, MAX_BYTES, NOW, SKEW_MS);
    let again = event::decode(bytes, MAX_BYTES, NOW, SKEW_MS);
    prop_assert_eq!(&first, &again, "decoding is deterministic");
    match first {
        Ok(e) => {
            // The contract's input event table: ids of 1–128 chars, names [A-Za-z0-9._-]{1,64},
            // count ≥ 1 on impressions only, propensity in (0, 1]; times within the skew.
            prop_assert!(bytes.len() <= MAX_BYTES);
            let id_chars = e.event_id.chars().count();
            prop_assert!((1..=128).contains(&id_chars), "event id of {} chars accepted", id_chars);
            prop_assert!(valid_name(&e.experiment) && valid_name(&e.arm), "names {:?} {:?}", e.experiment, e.arm);
            prop_assert!(e.ts_ms <= NOW + SKEW_MS, "event time {} beyond the skew", e.ts_ms);
            match e.kind {
                Kind::Impression => prop_assert!(e.count >= 1 && e.reward == 0.0),
                Kind::Reward => prop_assert!(e.count == 0 && !e.reward.is_nan()),
            }
            if let Some(p) = e.propensity {
                prop_assert!(p > 0.0 && p <= 1.0, "propensity {}", p);
            }
        }
        Err(r) => {
            // Reasons that need an experiment are given by the pipeline, never by the decoder.
            prop_assert!(
                !matches!(r, Reason::UnknownExperiment | Reason::TooManyExperiments | Reason::TooManyArms | Reason::RewardOutOfRange),
                "decoder gave {:?}",
                r
            );
        }
    }
    Ok(())
}

fn snapshot_decode_holds_its_contract(bytes: &[u8]) -> Result<(), TestCaseError> {
    if let Ok(s) = Snapshot::decode(bytes) {
        prop_assert_eq!(s.format, snapshot::FORMAT);
        prop_assert!(s.next_offset >= 0);
    }
    // What stands under a partition's key: a snapshot or a pointer to its parts.
    match snapshot::Stored::decode(bytes) {
        Ok(snapshot::Stored::Whole(s)) => prop_assert!(s.next_offset >= 0),
        Ok(snapshot::Stored::Parts(p)) => {
            prop_assert_eq!(p.format, snapshot::FORMAT);
            // Joining no parts against an arbitrary pointer is refused, never a panic.
            let _ = snapshot::join_parts(&p, &BTreeMap::new());
        }
        Err(_) => {}
    }
    // A part's header is 12 bytes; anything shorter is refused.
    match snapshot::decode_part(bytes) {
        Some((_, _, rest)) => prop_assert_eq!(rest.len() + 12, bytes.len()),
        None => prop_assert!(bytes.len() < 12),
    }
    Ok(())
}

fn quoted(s: &str) -> String {
    serde_json::to_string(s).expect("a string serialises")
}

/// What must hold of an event read after `teacher` by one stream decoder (which remembers the
/// shape of the events it read): the shape learned from `teacher` reads `bytes` exactly as
/// serde_json does, or leaves them; and the stream decoder decides as `event::decode` does.
/// The same holds of `bytes` cut short by one byte and of `bytes` followed by more text.
fn stream_decoding_holds_its_contract(teacher: &[u8], bytes: &[u8]) -> Result<bool, TestCaseError> {
    for tail in [&b"x"[..], b" ", b"}", b",\"count\":1}"] {
        one_after_another(teacher, &[bytes, tail].concat())?;
    }
    one_after_another(teacher, &bytes[..bytes.len().saturating_sub(1)])?;
    one_after_another(teacher, bytes)
}

fn one_after_another(teacher: &[u8], bytes: &[u8]) -> Result<bool, TestCaseError> {
    let taken = event::shape_path_agrees(teacher, bytes)
        .map_err(|e| TestCaseError::fail(format!("{e}: after {:?}: {:?}", String::from_utf8_lossy(teacher), String::from_utf8_lossy(bytes))))?;
    let mut d = event::Decoder::default();
    prop_assert_eq!(d.decode(teacher, MAX_BYTES, NOW, SKEW_MS), event::decode(teacher, MAX_BYTES, NOW, SKEW_MS));
    prop_assert_eq!(d.decode(bytes, MAX_BYTES, NOW, SKEW_MS), event::decode(bytes, MAX_BYTES, NOW, SKEW_MS));
    Ok(taken)
}

/// JSON text chosen to break readers: extreme and malformed numbers, strings that look like
/// numbers, long and non-ASCII strings, names and ids around their length limits, deep nesting.
fn hostile_json_text() -> impl Strategy<Value = String> {
    prop_oneof![
        prop::sample::select(vec![
            "null", "true", "false", "0", "-0", "0.0", "-0.0", "1", "1.0", "1e308", "-1e308", "1e309", "-1e309",
            "5e-324", "1e-400", "1.7976931348623157e308", "18446744073709551615", "18446744073709551616",
            "-9223372036854775808", "-9223372036854775809", "9223372036854775807", "1E2", "01", "+1", ".5",
            "\"NaN\"", "\"Infinity\"", "\"-Infinity\"", "\"1\"", "\"impression\"", "\"reward\"", "\"\"", "[]", "{}",
            "[\"impression\"]", "{\"kind\":\"reward\"}", "\"\\u0000\"", "\"\\ud800\"",
        ])
        .prop_map(String::from),
        any::<i64>().prop_map(|n| n.to_string()),
        any::<u64>().prop_map(|n| n.to_string()),
        any::<f64>().prop_map(|x| if x.is_finite() { format!("{x:e}") } else { quoted(&x.to_string()) }),
        "\\PC{0,80}".prop_map(|s| quoted(&s)),
        (0usize..20_000, any::<char>()).prop_map(|(n, c)| quoted(&c.to_string().repeat(n))),
        (60usize..70).prop_map(|n| quoted(&"n".repeat(n))),
        (120usize..135, prop::sample::select(vec!['i', 'é', '😀'])).prop_map(|(n, c)| quoted(&c.to_string().repeat(n))),
        (1usize..400, any::<bool>()).prop_map(|(depth, array)| if array {
            "[".repeat(depth) + &"]".repeat(depth)
        } else {
            "{\"a\":".repeat(depth) + "1" + &"}".repeat(depth)
        }),
    ]
}

const FIELDS: [&str; 9] = ["event_id", "kind", "experiment", "arm", "ts_ms", "count", "reward", "propensity", "weights_version"];

#[derive(Clone, Debug)]
enum Edit {
    /// Replace the field's first occurrence (or add it) with a value.
    Set(&'static str, String),
    Remove(&'static str),
    /// Add the field once more: duplicate keys.
    Repeat(&'static str, String),
    Unknown(String, String),
}

fn edit() -> impl Strategy<Value = Edit> {
    let field = prop::sample::select(FIELDS.to_vec());
    prop_oneof![
        (field.clone(), hostile_json_text()).prop_map(|(f, v)| Edit::Set(f, v)),
        field.clone().prop_map(Edit::Remove),
        (field, hostile_json_text()).prop_map(|(f, v)| Edit::Repeat(f, v)),
        ("\\PC{0,20}", hostile_json_text()).prop_map(|(k, v)| Edit::Unknown(k, v)),
    ]
}

/// A valid event as ordered `(key, JSON text)` pairs, so that duplicate keys can be written.
fn valid_fields(reward: bool) -> Vec<(String, String)> {
    let kind = if reward { "\"reward\"" } else { "\"impression\"" };
    let mut f: Vec<(String, String)> = vec![
        ("event_id".into(), "\"e-1\"".into()),
        ("kind".into(), kind.into()),
        ("experiment".into(), "\"thumb-style\"".into()),
        ("arm".into(), "\"warm\"".into()),
        ("ts_ms".into(), (NOW - 1000).to_string()),
    ];
    f.push(if reward { ("reward".into(), "1.0".into()) } else { ("count".into(), "3".into()) });
    f
}

fn render(fields: &[(String, String)]) -> Vec<u8> {
    let body: Vec<String> = fields.iter().map(|(k, v)| format!("{}:{v}", quoted(k))).collect();
    format!("{{{}}}", body.join(",")).into_bytes()
}

fn apply(fields: &mut Vec<(String, String)>, e: &Edit) {
    match e {
        Edit::Set(k, v) => match fields.iter_mut().find(|(f, _)| f == k) {
            Some(slot) => slot.1 = v.clone(),
            None => fields.push((k.to_string(), v.clone())),
        },
        Edit::Remove(k) => fields.retain(|(f, _)| f != k),
        Edit::Repeat(k, v) => fields.push((k.to_string(), v.clone())),
        Edit::Unknown(k, v) => fields.push((k.clone(), v.clone())),
    }
}

/// Random bytes overwritten at random places: what a torn write or a wrong producer gives.
fn corrupt(mut bytes: Vec<u8>, flips: &[(usize, u8)]) -> Vec<u8> {
    if !bytes.is_empty() {
        for &(i, b) in flips {
            let n = bytes.len();
            bytes[i % n] = b;
        }
    }
    bytes
}

#[test]
fn event_decoding_takes_arbitrary_bytes_without_panicking() {
    runner(2_000)
        .run(&prop::collection::vec(any::<u8>(), 0..2_048), |bytes| decode_holds_its_contract(&bytes))
        .unwrap();
    runner(2_000)
        .run(&"\\PC{0,400}", |text| decode_holds_its_contract(text.as_bytes()))
        .unwrap();
}

/// Events of the plain shape the fast path takes, with the freedom JSON allows (field order,
/// whitespace, nulls, integers of any size and sign, non-ASCII text): the fast path and
/// serde_json must read each the same, and most must take the fast path.
#[test]
fn the_fast_path_reads_plain_events_as_serde_json_does() {
    let ws = prop::sample::select(vec!["", " ", "\n", "\t ", "\r\n  "]);
    let string = prop_oneof![Just("null".to_string()), "[a-zA-Z0-9 ._\\-é€😀]{0,12}".prop_map(|s| quoted(&s))];
    let integer = prop_oneof![
        any::<i64>().prop_map(|v| v.to_string()),
        any::<u64>().prop_map(|v| v.to_string()),
        (-1_000i64..1_000).prop_map(|v| v.to_string()),
        Just("null".to_string()),
        Just("-0".to_string()),
        (any::<u32>(), 0u32..1_000_000, 0usize..9).prop_map(|(i, f, pad)| format!("{i}.{}{f}", "0".repeat(pad))),
        any::<f64>().prop_map(|v| if v.is_finite() { format!("{v}") } else { "0.5".to_string() }),
        (-1e6f64..1e6).prop_map(|v| format!("{v:.6}")),
    ];
    // Each field with two values: a second event written the same way, with other values,
    // is read by the shape the first one taught a stream decoder.
    let field = (0usize..9, string.clone(), integer.clone(), string, integer);
    let strategy = (prop::collection::vec((field, ws.clone(), ws.clone()), 0..9), ws);
    let (taken, by_shape) = (std::cell::Cell::new(0u32), std::cell::Cell::new(0u32));
    runner(2_000)
        .run(&strategy, |(fields, tail)| {
            let names = ["event_id", "kind", "experiment", "arm", "ts_ms", "count", "reward", "propensity", "weights_version"];
            let render = |second: bool| {
                let body: Vec<String> = fields
                    .iter()
                    .map(|((f, text, number, text2, number2), before, after)| {
                        let v = match (*f < 4, second) {
                            (true, false) => text,
                            (true, true) => text2,
                            (false, false) => number,
                            (false, true) => number2,
                        };
                        format!("{before}\"{}\"{after}:{before}{v}{after}", names[*f])
                    })
                    .collect();
                format!("{tail}{{{}}}{tail}", body.join(",")).into_bytes()
            };
            let (bytes, second) = (render(false), render(true));
            match event::fast_path_agrees(&bytes) {
                Ok(true) => taken.set(taken.get() + 1),
                Ok(false) => {}
                Err(e) => return Err(TestCaseError::fail(format!("{e}: {}", String::from_utf8_lossy(&bytes)))),
            }
            decode_holds_its_contract(&bytes)?;
            if stream_decoding_holds_its_contract(&bytes, &second)? {
                by_shape.set(by_shape.get() + 1);
            }
            Ok(())
        })
        .unwrap();
    assert!(taken.get() > 200, "only {} of 2 000 generated events took the fast path", taken.get());
    assert!(by_shape.get() > 100, "only {} of 2 000 second events were read by the shape of the first", by_shape.get());
}

#[test]
fn event_decoding_takes_mutated_events_without_panicking() {
    let strategy = (
        any::<bool>(),
        prop::collection::vec(edit(), 0..6),
        prop::collection::vec((any::<usize>(), any::<u8>()), 0..3),
    );
    let outcomes = std::cell::RefCell::new(BTreeMap::<&str, u32>::new());
    runner(2_000)
        .run(&strategy, |(reward, edits, flips)| {
            let mut fields = valid_fields(reward);
            for e in &edits {
                apply(&mut fields, e);
            }
            let bytes = render(&fields);
            let code = event::decode(&bytes, MAX_BYTES, NOW, SKEW_MS).map_or_else(|r| r.code(), |_| "ok");
            *outcomes.borrow_mut().entry(code).or_default() += 1;
            decode_holds_its_contract(&bytes)?;
            let teacher = render(&valid_fields(reward));
            stream_decoding_holds_its_contract(&teacher, &bytes)?;
            let corrupted = corrupt(bytes.clone(), &flips);
            stream_decoding_holds_its_contract(&bytes, &corrupted)?;
            decode_holds_its_contract(&corrupted)
        })
        .unwrap();
    // The mutations reach past the JSON reader into every check of the decoder: valid events
    // and at least eight kinds of rejection (common practice, no source: a coverage floor).
    let outcomes = outcomes.into_inner();
    eprintln!("mutated events by outcome: {outcomes:?}");
    assert!(outcomes.contains_key("ok") && outcomes.len() >= 9, "{outcomes:?}");
    runner(500)
        .run(&hostile_json_text(), |text| decode_holds_its_contract(text.as_bytes()))
        .unwrap();
}

#[test]
fn unknown_fields_never_change_how_a_valid_event_decodes() {
    let readable = hostile_json_text().prop_filter("JSON the reader takes", |t| serde_json::from_str::<serde::de::IgnoredAny>(t).is_ok());
    let key = "\\PC{0,20}".prop_filter("not a field of the contract", |k| !FIELDS.contains(&k.as_str()));
    let strategy = (any::<bool>(), prop::collection::vec((key, readable), 1..5));
    runner(1_000)
        .run(&strategy, |(reward, extra)| {
            let base = render(&valid_fields(reward));
            let want = event::decode(&base, MAX_BYTES, NOW, SKEW_MS).map(|e| format!("{e:?}"));
            prop_assert!(want.is_ok());
            let mut fields = valid_fields(reward);
            for (k, v) in extra {
                fields.insert(2, (k, v));
            }
            let bytes = render(&fields);
            let got = event::decode(&bytes, MAX_BYTES, NOW, SKEW_MS).map(|e| format!("{e:?}"));
            if bytes.len() > MAX_BYTES {
                prop_assert_eq!(got, Err(Reason::TooLarge));
            } else {
                prop_assert_eq!(got, want);
            }
            Ok(())
        })
        .unwrap();
}

/// `file → expected` from a manifest: one `name outcome` per line, `#` starts a comment.
fn manifest(path: &Path) -> BTreeMap<String, String> {
    let text = fs::read_to_string(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    text.lines()
        .map(|l| l.split('#').next().unwrap_or_default().trim())
        .filter(|l| !l.is_empty())
        .map(|l| {
            let (name, outcome) = l.split_once(char::is_whitespace).unwrap_or_else(|| panic!("manifest line {l:?}"));
            (name.to_string(), outcome.trim().to_string())
        })
        .collect()
}

fn corpus_files(dir: &Path) -> Vec<String> {
    let mut names: Vec<String> = fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|d| d.expect("directory entry").file_name().to_string_lossy().to_string())
        .filter(|n| n != "expected.txt")
        .collect();
    names.sort();
    names
}

#[test]
fn every_corpus_event_decodes_to_its_documented_outcome() {
    let dir = corpus("events");
    let expected = manifest(&dir.join("expected.txt"));
    let files = corpus_files(&dir);
    assert_eq!(files, expected.keys().cloned().collect::<Vec<_>>(), "every corpus file has one line in expected.txt");
    let codes: Vec<&str> = Reason::ALL.iter().map(|r| r.code()).collect();
    let mut wrong = Vec::new();
    for name in &files {
        let bytes = fs::read(dir.join(name)).expect("corpus file");
        let want = &expected[name];
        assert!(want == "ok" || codes.contains(&want.as_str()), "{name}: {want:?} is neither ok nor a reason code");
        let got = match event::decode(&bytes, MAX_BYTES, NOW, SKEW_MS) {
            Ok(_) => "ok",
            Err(r) => r.code(),
        };
        if got != want {
            wrong.push(format!("{name}: expected {want}, decoded {got}"));
        }
        decode_holds_its_contract(&bytes).unwrap_or_else(|e| panic!("{name}: {e}"));
    }
    assert!(wrong.is_empty(), "{}", wrong.join("\n"));
}

/// A snapshot as the pipeline writes it: a 0/1 experiment with three arms and a published
/// version, a bounded one whose newest arm joined after the last publish, a duplicate window
/// and counters. Weights are exact binary fractions so that the JSON round trip is exact.
fn sample_snapshot() -> Snapshot {
    let t0 = 1_764_547_200_000;
    let names = |a: &[&str]| a.iter().map(|s| s.to_string()).collect::<Vec<_>>();
    let mut clicks =
        Experiment::new(ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli), &names(&["warm", "cool", "mono"]))
            .expect("experiment");
    for (j, (pulls, rewards)) in [(120u64, 9), (80, 4), (40, 1)].into_iter().enumerate() {
        clicks.observe(j, t0 + j as i64, Observation::Impression { count: pulls }).expect("impression");
        for _ in 0..rewards {
            clicks.observe(j, t0 + 500, Observation::reward(1.0)).expect("reward");
        }
    }
    clicks.commit(&[0.5, 0.25, 0.25]);
    clicks.commit(&[0.625, 0.25, 0.125]);
    let mut watch =
        Experiment::new(ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bounded { max: 60.0 }), &names(&["short", "long"]))
            .expect("experiment");
    watch.observe(0, t0, Observation::Impression { count: 10 }).expect("impression");
    watch.observe(0, t0 + 10, Observation::reward(42.5)).expect("reward");
    watch.commit(&[0.5, 0.5]);
    let late = watch.arm_or_add("late").expect("third arm");
    watch.observe(late, t0 + 20, Observation::Impression { count: 1 }).expect("impression");
    // Eight remembered event ids, oldest first, as a snapshot lists them.
    let duplicates: Vec<u64> = (3..11).map(|i| DedupWindow::hash(&format!("imp-{i}"))).collect();
    Snapshot {
        format: snapshot::FORMAT,
        topic: "apportion.events".into(),
        partition: 2,
        next_offset: 1_234,
        generation: 3,
        written_at_ms: t0 + 60_000,
        // Written before snapshots carried these: the defaults they read back with.
        group_generation: -1,
        handed_over: false,
        version_floor: 0,
        experiments: [("clicks".to_string(), clicks.state()), ("watch".to_string(), watch.state())].into_iter().collect(),
        duplicates,
        impressions: Vec::new(),
        counters: Counters {
            events: [("impression/applied", 254u64), ("reward/applied", 15), ("unknown/rejected", 2)]
                .into_iter()
                .map(|(k, v)| (k.to_string(), v))
                .collect(),
            dead_letters: [("not-json".to_string(), 2u64)].into_iter().collect(),
            split: BTreeMap::new(),
            unmatched_rewards: BTreeMap::new(),
            ..Counters::default()
        },
    }
}

/// Writes the snapshot corpus from [`sample_snapshot`]; run with `WRITE_TEST_CORPUS=1`
/// after a deliberate change of the snapshot layout.
fn write_snapshot_corpus(dir: &Path) {
    let valid = sample_snapshot().encode().expect("snapshot encodes");
    let v: Value = serde_json::from_slice(&valid).expect("snapshot is JSON");
    let variant = |f: &dyn Fn(&mut Value)| {
        let mut c = v.clone();
        f(&mut c);
        serde_json::to_vec(&c).expect("JSON")
    };
    let files: Vec<(&str, Vec<u8>, &str, &str)> = vec![
        ("valid.json", valid.clone(), "ok", "written by Snapshot::encode from a real snapshot"),
        ("extra-field.json", variant(&|c| c["written_by"] = "a newer version".into()), "ok", "unknown fields are ignored"),
        ("truncated.json", valid[..valid.len() / 2].to_vec(), "error", "a torn write"),
        ("format-2.json", variant(&|c| c["format"] = 2.into()), "error", "a layout this version does not know"),
        ("negative-offset.json", variant(&|c| c["next_offset"] = (-5).into()), "error", ""),
        (
            "wrong-types.json",
            variant(&|c| {
                c["next_offset"] = "1234".into();
                c["partition"] = 2.5.into();
            }),
            "error",
            "an offset as a string, a partition as a float",
        ),
        ("missing-experiments.json", variant(&|c| drop(c.as_object_mut().map(|o| o.remove("experiments")))), "error", ""),
        (
            "without-generation.json",
            variant(&|c| drop(c.as_object_mut().map(|o| o.remove("generation")))),
            "ok",
            "as written before snapshots counted generations: reads as generation 0",
        ),
        ("empty", Vec::new(), "error", "zero bytes"),
    ];
    fs::create_dir_all(dir).expect("corpus folder");
    let mut manifest = String::from(
        "# Expected outcome of apportion::stream::snapshot::Snapshot::decode for each file of this\n\
         # folder: `ok` or `error`. Written by write_snapshot_corpus in tests/decoding.rs\n\
         # (WRITE_TEST_CORPUS=1 cargo test --test decoding corpus_snapshot).\n",
    );
    for (name, bytes, outcome, note) in files {
        fs::write(dir.join(name), bytes).expect("corpus file written");
        let line = format!("{name} {outcome}");
        manifest.push_str(&if note.is_empty() { line } else { format!("{line:<32} # {note}") });
        manifest.push('\n');
    }
    fs::write(dir.join("expected.txt"), manifest).expect("manifest written");
}

#[test]
fn every_corpus_snapshot_decodes_to_its_documented_outcome() {
    let dir = corpus("snapshots");
    if std::env::var_os("WRITE_TEST_CORPUS").is_some() {
        write_snapshot_corpus(&dir);
    }
    let expected = manifest(&dir.join("expected.txt"));
    let files = corpus_files(&dir);
    assert_eq!(files, expected.keys().cloned().collect::<Vec<_>>(), "every corpus file has one line in expected.txt");
    for name in &files {
        let bytes = fs::read(dir.join(name)).expect("corpus file");
        let got = Snapshot::decode(&bytes);
        match expected[name].as_str() {
            "ok" => assert!(got.is_ok(), "{name}: {got:?}"),
            "error" => assert!(got.is_err(), "{name}: decoded {got:?}"),
            other => panic!("{name}: outcome {other:?} is neither ok nor error"),
        }
    }
    let valid = Snapshot::decode(&fs::read(dir.join("valid.json")).expect("valid.json")).expect("valid.json decodes");
    assert_eq!(
        valid,
        sample_snapshot(),
        "valid.json no longer matches what the code writes; if the layout changed on purpose, raise snapshot::FORMAT and \
         regenerate with WRITE_TEST_CORPUS=1"
    );
    assert_eq!(Snapshot::decode(&valid.encode().expect("encodes")).as_ref(), Ok(&valid), "encode and decode round-trip");
}

/// Any JSON value, with numbers at the edges of their types and nesting up to a depth.
fn hostile_json_value() -> impl Strategy<Value = Value> {
    let leaf = prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::from),
        any::<i64>().prop_map(Value::from),
        any::<u64>().prop_map(Value::from),
        any::<f64>().prop_map(Value::from),
        prop::sample::select(vec![i64::MIN, -1, 0, i64::MAX]).prop_map(Value::from),
        prop::sample::select(vec![f64::MAX, f64::MIN_POSITIVE, -0.0, 1e-300, -1e308]).prop_map(Value::from),
        "\\PC{0,40}".prop_map(Value::from),
    ];
    leaf.prop_recursive(6, 64, 8, |inner| {
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..8).prop_map(Value::from),
            prop::collection::btree_map("\\PC{0,10}", inner, 0..8).prop_map(|m| Value::Object(m.into_iter().collect())),
        ]
    })
}

/// Every JSON pointer into `v`, the root included.
fn pointers(v: &Value, at: String, out: &mut Vec<String>) {
    match v {
        Value::Array(a) => a.iter().enumerate().for_each(|(i, x)| pointers(x, format!("{at}/{i}"), out)),
        Value::Object(o) => o.iter().for_each(|(k, x)| pointers(x, format!("{at}/{}", k.replace('~', "~0").replace('/', "~1")), out)),
        _ => {}
    }
    out.push(at);
}

#[test]
fn snapshot_decoding_takes_arbitrary_and_mutated_bytes_without_panicking() {
    runner(2_000)
        .run(&prop::collection::vec(any::<u8>(), 0..4_096), |bytes| snapshot_decode_holds_its_contract(&bytes))
        .unwrap();
    let valid: Value = serde_json::from_slice(&sample_snapshot().encode().expect("encodes")).expect("JSON");
    let mut all = Vec::new();
    pointers(&valid, String::new(), &mut all);
    let strategy = (
        prop::collection::vec((0..all.len(), any::<bool>(), hostile_json_value()), 1..4),
        prop::collection::vec((any::<usize>(), any::<u8>()), 0..3),
    );
    runner(2_000)
        .run(&strategy, |(edits, flips)| {
            let mut v = valid.clone();
            for (i, remove, new) in edits {
                let p = &all[i];
                if remove {
                    if let Some((parent, key)) = p.rsplit_once('/') {
                        match v.pointer_mut(parent) {
                            Some(Value::Object(o)) => drop(o.remove(&key.replace("~1", "/").replace("~0", "~"))),
                            Some(Value::Array(a)) => {
                                if let Ok(k) = key.parse::<usize>() {
                                    if k < a.len() {
                                        a.remove(k);
                                    }
                                }
                            }
                            _ => {}
                        }
                    }
                } else if let Some(slot) = v.pointer_mut(p) {
                    *slot = new;
                }
            }
            let bytes = serde_json::to_vec(&v).expect("JSON");
            snapshot_decode_holds_its_contract(&bytes)?;
            snapshot_decode_holds_its_contract(&corrupt(bytes, &flips))
        })
        .unwrap();
}

#[test]
fn a_snapshot_of_any_accepted_reward_reads_back() {
    // `bounded` rewards take any finite max > 0 (RewardModel::validate). Whatever maximum the
    // configuration accepts, a reward at it must leave a snapshot that reads back; JSON has no
    // infinity, and serde_json writes a non-finite f64 as null.
    let mut unreadable = Vec::new();
    for max in [1.0, 1e100, 1e154, 1e200, 1e300, f64::MAX] {
        let spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Ucb1), RewardModel::Bounded { max });
        let Ok(mut e) = Experiment::new(spec, &["a".to_string()]) else { continue };
        let json = format!(r#"{{"event_id":"r","kind":"reward","experiment":"x","arm":"a","ts_ms":0,"reward":{max:e}}}"#);
        let ev = event::decode(json.as_bytes(), MAX_BYTES, NOW, SKEW_MS).expect("decodes");
        if e.observe(0, ev.ts_ms, Observation::reward(ev.reward)).is_err() {
            continue;
        }
        e.observe(0, ev.ts_ms, Observation::Impression { count: 1 }).expect("impression");
        let mut snap = sample_snapshot();
        snap.experiments.insert("big".into(), e.state());
        let bytes = snap.encode().expect("encodes");
        if let Err(err) = Snapshot::decode(&bytes) {
            unreadable.push(format!("max {max:e}: {err}"));
        }
    }
    assert!(unreadable.is_empty(), "snapshots the pipeline would write cannot be read back:\n{}", unreadable.join("\n"));
}
