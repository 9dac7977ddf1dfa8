//! Input events in the contract's JSON, for tests that write them to the input topic.

/// An impression of one unit.
pub fn impression(id: &str, exp: &str, arm: &str, ts: i64) -> String {
    format!(r#"{{"event_id":"{id}","kind":"impression","experiment":"{exp}","arm":"{arm}","ts_ms":{ts}}}"#)
}

/// A reward of `value`.
pub fn reward(id: &str, exp: &str, arm: &str, ts: i64, value: f64) -> String {
    format!(r#"{{"event_id":"{id}","kind":"reward","experiment":"{exp}","arm":"{arm}","ts_ms":{ts},"reward":{value}}}"#)
}
