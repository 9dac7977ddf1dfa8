//! The wall clock, read in one place. The core never reads it: times are passed in, so that the
//! core and the simulator stay deterministic.

/// Milliseconds since the Unix epoch (0 if the clock is set before it).
pub fn now_ms() -> i64 {
    std::time::SystemTime::now().duration_since(std::time::UNIX_EPOCH).map_or(0, |d| d.as_millis() as i64)
}
