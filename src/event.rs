//! Input events: decoding and validation, without panicking on any input.
//!
//! Everything wrong with an event maps to a short reason code, which is what the dead-letter
//! header `apportion-reason` and the `reason` label of `apportion_dead_letters_total` carry.

use std::borrow::Cow;

use serde::Deserialize;

#[cfg(any(feature = "sonic-rs", feature = "simd-json"))]
pub mod libraries;
mod scan;
#[doc(hidden)]
pub use scan::{fast_path_agrees, shape_path_agrees};

/// Why an event was rejected. The codes are part of the contract (dead-letter header, metric
/// label); keep them stable.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Reason {
    TooLarge,
    NotJson,
    NotObject,
    MissingField,
    WrongType,
    UnknownKind,
    BadEventId,
    BadName,
    ZeroCount,
    MisplacedField,
    BadPropensity,
    RewardOutOfRange,
    FutureTime,
    UnknownExperiment,
    TooManyExperiments,
    TooManyArms,
    UnknownArm,
    /// An event of an experiment whose definition in force retired it.
    RetiredExperiment,
    /// A reward's `impression_id` that is empty or over 128 characters.
    BadImpressionId,
    /// A reward whose `impression_ts_ms` is later than its own time by more than the allowed
    /// clock skew.
    ImpressionAfterReward,
}

impl Reason {
    pub const ALL: [Reason; 20] = [
        Reason::TooLarge,
        Reason::NotJson,
        Reason::NotObject,
        Reason::MissingField,
        Reason::WrongType,
        Reason::UnknownKind,
        Reason::BadEventId,
        Reason::BadName,
        Reason::ZeroCount,
        Reason::MisplacedField,
        Reason::BadPropensity,
        Reason::RewardOutOfRange,
        Reason::FutureTime,
        Reason::UnknownExperiment,
        Reason::TooManyExperiments,
        Reason::TooManyArms,
        Reason::UnknownArm,
        Reason::RetiredExperiment,
        Reason::BadImpressionId,
        Reason::ImpressionAfterReward,
    ];

    pub fn code(self) -> &'static str {
        match self {
            Reason::TooLarge => "too-large",
            Reason::NotJson => "not-json",
            Reason::NotObject => "not-object",
            Reason::MissingField => "missing-field",
            Reason::WrongType => "wrong-type",
            Reason::UnknownKind => "unknown-kind",
            Reason::BadEventId => "bad-event-id",
            Reason::BadName => "bad-name",
            Reason::ZeroCount => "zero-count",
            Reason::MisplacedField => "misplaced-field",
            Reason::BadPropensity => "bad-propensity",
            Reason::RewardOutOfRange => "reward-out-of-range",
            Reason::FutureTime => "future-time",
            Reason::UnknownExperiment => "unknown-experiment",
            Reason::TooManyExperiments => "too-many-experiments",
            Reason::TooManyArms => "too-many-arms",
            Reason::UnknownArm => "unknown-arm",
            Reason::RetiredExperiment => "retired-experiment",
            Reason::BadImpressionId => "bad-impression-id",
            Reason::ImpressionAfterReward => "impression-after-reward",
        }
    }
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Kind {
    Impression,
    Reward,
}

impl Kind {
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Impression => "impression",
            Kind::Reward => "reward",
        }
    }
}

/// A valid event. Strings borrow from the message where JSON allows it.
#[derive(Clone, Debug, PartialEq)]
pub struct Event<'a> {
    pub event_id: Cow<'a, str>,
    pub kind: Kind,
    pub experiment: Cow<'a, str>,
    pub arm: Cow<'a, str>,
    pub ts_ms: i64,
    /// Impressions carried (1 unless pre-aggregated); 0 for rewards.
    pub count: u64,
    /// Reward value; 0 for impressions.
    pub reward: f64,
    pub propensity: Option<f64>,
    pub weights_version: Option<u64>,
    /// Rewards only: the `event_id` of the impression the reward is for.
    pub impression_id: Option<Cow<'a, str>>,
    /// Rewards only: the event time of the impression the reward is for.
    pub impression_ts_ms: Option<i64>,
}

#[derive(Debug, Default, Deserialize, PartialEq)]
struct Raw<'a> {
    #[serde(borrow, default, deserialize_with = "borrowed")]
    event_id: Option<Cow<'a, str>>,
    #[serde(borrow, default, deserialize_with = "borrowed")]
    kind: Option<Cow<'a, str>>,
    #[serde(borrow, default, deserialize_with = "borrowed")]
    experiment: Option<Cow<'a, str>>,
    #[serde(borrow, default, deserialize_with = "borrowed")]
    arm: Option<Cow<'a, str>>,
    ts_ms: Option<i64>,
    count: Option<u64>,
    reward: Option<f64>,
    propensity: Option<f64>,
    weights_version: Option<u64>,
    #[serde(borrow, default, deserialize_with = "borrowed")]
    impression_id: Option<Cow<'a, str>>,
    impression_ts_ms: Option<i64>,
}

/// An optional string borrowed from the message when it has no escapes. (serde's own
/// `Option<Cow<str>>` always copies, which cost four allocations per event.)
fn borrowed<'de, D: serde::Deserializer<'de>>(d: D) -> Result<Option<Cow<'de, str>>, D::Error> {
    struct Text;
    impl<'de> serde::de::Visitor<'de> for Text {
        type Value = Cow<'de, str>;
        fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
            f.write_str("a string")
        }
        fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Self::Value, E> {
            Ok(Cow::Borrowed(v))
        }
        fn visit_str<E>(self, v: &str) -> Result<Self::Value, E> {
            Ok(Cow::Owned(v.to_owned()))
        }
        fn visit_string<E>(self, v: String) -> Result<Self::Value, E> {
            Ok(Cow::Owned(v))
        }
    }
    struct Maybe;
    impl<'de> serde::de::Visitor<'de> for Maybe {
        type Value = Option<Cow<'de, str>>;
        fn expecting(&self, f: &mut std::fmt::Formatter) -> std::fmt::Result {
            f.write_str("a string or null")
        }
        fn visit_none<E>(self) -> Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_unit<E>(self) -> Result<Self::Value, E> {
            Ok(None)
        }
        fn visit_some<D: serde::Deserializer<'de>>(self, d: D) -> Result<Self::Value, D::Error> {
            d.deserialize_str(Text).map(Some)
        }
    }
    d.deserialize_option(Maybe)
}

/// `[A-Za-z0-9._-]{1,64}`: experiment and arm names.
pub fn valid_name(s: &str) -> bool {
    !s.is_empty() && s.len() <= 64 && s.bytes().all(|b| NAME_BYTES[usize::from(b)])
}

/// The bytes `valid_name` allows, as a table (one load per byte instead of four tests).
const NAME_BYTES: [bool; 256] = {
    let mut t = [false; 256];
    let mut i = 0;
    while i < 256 {
        let b = i as u8;
        t[i] = b.is_ascii_alphanumeric() || b == b'.' || b == b'_' || b == b'-';
        i += 1;
    }
    t
};

/// Decodes and validates one message value. `now_ms` and `max_skew_ms` bound the event time;
/// the reward range is checked later, by the experiment's reward model.
pub fn decode(bytes: &[u8], max_bytes: usize, now_ms: i64, max_skew_ms: i64) -> Result<Event<'_>, Reason> {
    if bytes.len() > max_bytes {
        return Err(Reason::TooLarge);
    }
    let mut raw = Raw::default();
    let taken = scan::scan(bytes, &mut raw).is_some();
    validate(bytes, raw, taken, now_ms, max_skew_ms)
}

/// Decodes events one after another, as [`decode`] does, remembering the last two layouts of
/// event it read (impressions and rewards, usually): an event written like one of them is read
/// by comparing the text between its values, without looking for its keys (`scan::Shape`).
#[derive(Default)]
pub struct Decoder {
    shapes: [scan::Shape; 2],
    /// The shape that took the last event.
    last: usize,
    #[cfg(any(feature = "stream-sonic-rs", feature = "stream-simd-json"))]
    library: libraries::LibraryDecoder,
}

/// The library the stream reads events with instead, in a build made to measure it.
#[cfg(feature = "stream-sonic-rs")]
const STREAM_LIBRARY: libraries::Library = libraries::Library::SonicRs;
#[cfg(all(feature = "stream-simd-json", not(feature = "stream-sonic-rs")))]
const STREAM_LIBRARY: libraries::Library = libraries::Library::SimdJson;

impl Decoder {
    pub fn decode<'a>(&mut self, bytes: &'a [u8], max_bytes: usize, now_ms: i64, max_skew_ms: i64) -> Result<Event<'a>, Reason> {
        #[cfg(any(feature = "stream-sonic-rs", feature = "stream-simd-json"))]
        return self.library.decode(STREAM_LIBRARY, bytes, max_bytes, now_ms, max_skew_ms);
        #[cfg(not(any(feature = "stream-sonic-rs", feature = "stream-simd-json")))]
        self.decode_by_hand(bytes, max_bytes, now_ms, max_skew_ms)
    }

    /// The hand-written reader: shapes, then the general scan, then serde_json.
    #[inline(always)]
    #[cfg_attr(any(feature = "stream-sonic-rs", feature = "stream-simd-json"), allow(dead_code))]
    fn decode_by_hand<'a>(&mut self, bytes: &'a [u8], max_bytes: usize, now_ms: i64, max_skew_ms: i64) -> Result<Event<'a>, Reason> {
        if bytes.len() > max_bytes {
            return Err(Reason::TooLarge);
        }
        let mut raw = Raw::default();
        let taken = self.read(bytes, &mut raw);
        validate(bytes, raw, taken, now_ms, max_skew_ms)
    }

    /// Fills `raw` by a shape or by the general scan; `false` to leave the event to serde_json.
    fn read<'a>(&mut self, bytes: &'a [u8], raw: &mut Raw<'a>) -> bool {
        let (last, other) = (self.last, 1 - self.last);
        if self.shapes[last].read(bytes, raw).is_some() {
            return true;
        }
        *raw = Raw::default();
        if self.shapes[other].read(bytes, raw).is_some() {
            self.last = other;
            return true;
        }
        *raw = Raw::default();
        let mut spans = scan::Spans::default();
        if scan::scan_noting(bytes, raw, &mut spans).is_none() {
            return false;
        }
        // The new shape replaces the one that took nothing just now.
        if let Some(shape) = scan::Shape::learn(bytes, &spans) {
            self.shapes[other] = shape;
            self.last = other;
        }
        true
    }
}

/// The checks of an event read into `raw` (`taken`), or read by serde_json otherwise.
#[inline(always)]
fn validate<'a>(bytes: &'a [u8], mut raw: Raw<'a>, taken: bool, now_ms: i64, max_skew_ms: i64) -> Result<Event<'a>, Reason> {
    if !taken {
        raw = serde_json::from_slice(bytes).map_err(|e| {
            use serde_json::error::Category;
            match e.classify() {
                Category::Data => {
                    if first_byte(bytes) == Some(b'{') {
                        Reason::WrongType
                    } else {
                        Reason::NotObject
                    }
                }
                Category::Io | Category::Syntax | Category::Eof => Reason::NotJson,
            }
        })?;
    }
    let (Some(event_id), Some(kind), Some(experiment), Some(arm), Some(ts_ms)) =
        (raw.event_id, raw.kind, raw.experiment, raw.arm, raw.ts_ms)
    else {
        return Err(Reason::MissingField);
    };
    let kind = match kind.as_ref() {
        "impression" => Kind::Impression,
        "reward" => Kind::Reward,
        _ => return Err(Reason::UnknownKind),
    };
    // At most 128 characters; a string of at most 128 bytes needs no counting.
    if event_id.is_empty() || (event_id.len() > 128 && event_id.chars().count() > 128) {
        return Err(Reason::BadEventId);
    }
    if !valid_name(&experiment) || !valid_name(&arm) {
        return Err(Reason::BadName);
    }
    let (count, reward) = match kind {
        Kind::Impression => {
            if raw.reward.is_some() || raw.impression_id.is_some() || raw.impression_ts_ms.is_some() {
                return Err(Reason::MisplacedField);
            }
            match raw.count {
                Some(0) => return Err(Reason::ZeroCount),
                c => (c.unwrap_or(1), 0.0),
            }
        }
        Kind::Reward => {
            if raw.count.is_some() {
                return Err(Reason::MisplacedField);
            }
            (0, raw.reward.unwrap_or(1.0))
        }
    };
    if let Some(p) = raw.propensity {
        if !(p > 0.0 && p <= 1.0) {
            return Err(Reason::BadPropensity);
        }
    }
    if ts_ms > now_ms.saturating_add(max_skew_ms) {
        return Err(Reason::FutureTime);
    }
    if let Some(id) = &raw.impression_id {
        if id.is_empty() || (id.len() > 128 && id.chars().count() > 128) {
            return Err(Reason::BadImpressionId);
        }
    }
    if raw.impression_ts_ms.is_some_and(|t| t > ts_ms.saturating_add(max_skew_ms)) {
        return Err(Reason::ImpressionAfterReward);
    }
    Ok(Event {
        event_id,
        kind,
        experiment,
        arm,
        ts_ms,
        count,
        reward,
        propensity: raw.propensity,
        weights_version: raw.weights_version,
        impression_id: raw.impression_id,
        impression_ts_ms: raw.impression_ts_ms,
    })
}

fn first_byte(bytes: &[u8]) -> Option<u8> {
    bytes.iter().copied().find(|b| !b.is_ascii_whitespace())
}

#[cfg(test)]
mod tests {
    use super::*;

    const NOW: i64 = 1_764_547_200_000;

    fn check(json: &str) -> Result<Event<'_>, Reason> {
        decode(json.as_bytes(), 4096, NOW, 300_000)
    }

    #[test]
    fn a_reward_names_its_impression_by_id_and_by_time() {
        let text = format!(r#"{{"event_id":"rew-1","kind":"reward","experiment":"x","arm":"a","ts_ms":{NOW},"impression_id":"imp-1","impression_ts_ms":{}}}"#, NOW - 4_000);
        let e = check(&text).unwrap();
        assert_eq!((e.impression_id.as_deref(), e.impression_ts_ms), (Some("imp-1"), Some(NOW - 4_000)));
        // A little after the reward is clock skew between services, not an error.
        assert!(check(&format!(r#"{{"event_id":"rew-2","kind":"reward","experiment":"x","arm":"a","ts_ms":{NOW},"impression_ts_ms":{}}}"#, NOW + 1_000)).is_ok());
    }

    #[test]
    fn accepts_the_examples_of_the_contract() {
        let e = check(r#"{"event_id":"imp-8f2c01","kind":"impression","experiment":"thumb-style","arm":"warm","ts_ms":1764547200000,"count":1,"propensity":0.25,"weights_version":17}"#).unwrap();
        assert_eq!((e.kind, e.count, e.weights_version), (Kind::Impression, 1, Some(17)));
        let r = check(r#"{"event_id":"rew-8f2c01","kind":"reward","experiment":"thumb-style","arm":"warm","ts_ms":1764547203120,"reward":1.0}"#).unwrap();
        assert_eq!((r.kind, r.reward), (Kind::Reward, 1.0));
    }

    #[test]
    fn names_a_reason_for_each_kind_of_bad_input() {
        let base = |extra: &str| {
            format!(r#"{{"event_id":"e1","kind":"impression","experiment":"x","arm":"a","ts_ms":{NOW}{extra}}}"#)
        };
        let reward = |extra: &str| format!(r#"{{"event_id":"r1","kind":"reward","experiment":"x","arm":"a","ts_ms":{NOW}{extra}}}"#);
        let cases: Vec<(String, Reason)> = vec![
            ("not json".into(), Reason::NotJson),
            ("[1,2]".into(), Reason::NotObject),
            ("42".into(), Reason::NotObject),
            (r#"{"kind":"impression"}"#.into(), Reason::MissingField),
            (r#"{"event_id":"e","kind":"impression","experiment":"x","arm":"a","ts_ms":"soon"}"#.into(), Reason::WrongType),
            (r#"{"event_id":"e","kind":"click","experiment":"x","arm":"a","ts_ms":1}"#.into(), Reason::UnknownKind),
            (r#"{"event_id":"e","kind":"impression","experiment":"x y","arm":"a","ts_ms":1}"#.into(), Reason::BadName),
            (r#"{"event_id":"","kind":"impression","experiment":"x","arm":"a","ts_ms":1}"#.into(), Reason::BadEventId),
            (base(r#","count":0"#), Reason::ZeroCount),
            (base(r#","count":-1"#), Reason::WrongType),
            (base(r#","reward":1"#), Reason::MisplacedField),
            (base(r#","propensity":0"#), Reason::BadPropensity),
            (format!(r#"{{"event_id":"e","kind":"impression","experiment":"x","arm":"a","ts_ms":{}}}"#, NOW + 3_600_000), Reason::FutureTime),
            (base(r#","impression_id":"e0""#), Reason::MisplacedField),
            (base(r#","impression_ts_ms":1"#), Reason::MisplacedField),
            (reward(r#","impression_id":"""#), Reason::BadImpressionId),
            (reward(&format!(r#","impression_id":"{}""#, "i".repeat(129))), Reason::BadImpressionId),
            (reward(r#","impression_id":7"#), Reason::WrongType),
            (reward(r#","impression_ts_ms":1.5"#), Reason::WrongType),
            (reward(&format!(r#","impression_ts_ms":{}"#, NOW + 3_600_000)), Reason::ImpressionAfterReward),
        ];
        for (input, reason) in cases {
            assert_eq!(check(&input).map(|_| ()), Err(reason), "{input}");
        }
        assert_eq!(decode(&[b' '; 5000], 4096, NOW, 0).map(|_| ()), Err(Reason::TooLarge));
    }
}

#[cfg(test)]
mod borrowing {
    use super::*;

    #[test]
    fn ids_without_escapes_are_borrowed_and_escaped_ones_still_decode() {
        let plain = br#"{"event_id":"imp-1","kind":"impression","experiment":"thumb-style","arm":"warm","ts_ms":1}"#;
        let e = decode(plain, 16_384, 10, 0).expect("decodes");
        assert!(matches!((&e.event_id, &e.experiment, &e.arm), (Cow::Borrowed(_), Cow::Borrowed(_), Cow::Borrowed(_))));
        let escaped = br#"{"event_id":"imp-\u0032","kind":"impression","experiment":"thumb-style","arm":"warm","ts_ms":1}"#;
        assert_eq!(decode(escaped, 16_384, 10, 0).expect("decodes").event_id, "imp-2");
        let null_id = br#"{"event_id":null,"kind":"impression","experiment":"x","arm":"y","ts_ms":1}"#;
        assert_eq!(decode(null_id, 16_384, 10, 0).err(), Some(Reason::MissingField));
        let number_id = br#"{"event_id":7,"kind":"impression","experiment":"x","arm":"y","ts_ms":1}"#;
        assert_eq!(decode(number_id, 16_384, 10, 0).err(), Some(Reason::WrongType));
    }
}
