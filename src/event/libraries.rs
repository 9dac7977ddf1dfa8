//! The published JSON libraries the hand-written reader was measured against (BENCHMARKS.md,
//! "Decoder"): sonic-rs and simd-json, each filling the same `Raw` through its serde support,
//! so that the checks after reading are the same. Built only with their cargo features; the
//! features `stream-sonic-rs` and `stream-simd-json` make the stream read every event with one
//! of them, for the end-to-end measurement.

#[cfg(feature = "simd-json")]
use std::borrow::Cow;

use super::{first_byte, validate, Event, Raw, Reason};

/// Which reader fills `Raw`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Library {
    #[cfg(feature = "sonic-rs")]
    SonicRs,
    #[cfg(feature = "simd-json")]
    SimdJson,
}

impl Library {
    pub const ALL: &'static [Library] = &[
        #[cfg(feature = "sonic-rs")]
        Library::SonicRs,
        #[cfg(feature = "simd-json")]
        Library::SimdJson,
    ];

    pub fn name(self) -> &'static str {
        match self {
            #[cfg(feature = "sonic-rs")]
            Library::SonicRs => "sonic-rs",
            #[cfg(feature = "simd-json")]
            Library::SimdJson => "simd-json",
        }
    }
}

/// Reading and checking with a library; `scratch` is the copy simd-json parses in place, and
/// `buffers` its working memory, both kept from one event to the next as its documentation
/// recommends.
#[derive(Default)]
pub struct LibraryDecoder {
    #[cfg(feature = "simd-json")]
    scratch: Vec<u8>,
    #[cfg(feature = "simd-json")]
    buffers: simd_json::Buffers,
}

impl LibraryDecoder {
    pub fn decode<'a>(&mut self, library: Library, bytes: &'a [u8], max_bytes: usize, now_ms: i64, max_skew_ms: i64) -> Result<Event<'a>, Reason> {
        if bytes.len() > max_bytes {
            return Err(Reason::TooLarge);
        }
        let raw = match library {
            #[cfg(feature = "sonic-rs")]
            Library::SonicRs => sonic_rs::from_slice::<Raw<'a>>(bytes).map_err(|e| {
                use sonic_rs::error::Category;
                refused(bytes, matches!(e.classify(), Category::TypeUnmatched | Category::NotFound))
            })?,
            #[cfg(feature = "simd-json")]
            Library::SimdJson => {
                // simd-json parses a mutable copy in place; what it borrows from the copy is
                // copied out again, since the event outlives the next message.
                self.scratch.clear();
                self.scratch.extend_from_slice(bytes);
                let raw = simd_json::serde::from_slice_with_buffers::<Raw<'_>>(&mut self.scratch, &mut self.buffers).map_err(|e| refused(bytes, e.is_data()))?;
                owned(raw)
            }
        };
        validate(bytes, raw, true, now_ms, max_skew_ms)
    }
}

/// The reason for a message a library refused: a JSON object of the wrong fields or types
/// (`data`), a JSON value that is no object, or no JSON.
fn refused(bytes: &[u8], data: bool) -> Reason {
    match (data, first_byte(bytes)) {
        (true, Some(b'{')) => Reason::WrongType,
        (true, _) => Reason::NotObject,
        (false, _) => Reason::NotJson,
    }
}

#[cfg(feature = "simd-json")]
fn owned(raw: Raw<'_>) -> Raw<'static> {
    let own = |s: Option<Cow<'_, str>>| s.map(|s| Cow::Owned(s.into_owned()));
    Raw {
        event_id: own(raw.event_id),
        kind: own(raw.kind),
        experiment: own(raw.experiment),
        arm: own(raw.arm),
        ts_ms: raw.ts_ms,
        count: raw.count,
        reward: raw.reward,
        propensity: raw.propensity,
        weights_version: raw.weights_version,
        impression_id: own(raw.impression_id),
        impression_ts_ms: raw.impression_ts_ms,
    }
}
