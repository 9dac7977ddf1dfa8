//! The one test harness: the broker's address and plain Kafka clients (`broker`), events in the
//! contract's JSON (`events`), the sidecar in this process (`sidecar`) or as a child process of
//! its own binary (`process`), reading a scrape (`scrape`), and a loopback HTTP client (`http`). Every wait is bounded by a deadline.
//!
//! Tests that need a broker begin with `if no_broker() { return; }`: without
//! `TEST_KAFKA_BROKERS` (scripts/test sets it) they say so and pass as skipped.
#![allow(dead_code, unused_imports)]

use std::time::{Duration, Instant};

pub mod broker;
pub mod events;
pub mod http;
pub mod process;
pub mod scrape;
pub mod sidecar;

pub use broker::*;
pub use events::*;
pub use process::*;
pub use scrape::*;
pub use sidecar::*;

pub fn unique(prefix: &str) -> String {
    format!("{prefix}-{:016x}", rand::random::<u64>())
}

pub fn free_port() -> u16 {
    std::net::TcpListener::bind("127.0.0.1:0").and_then(|l| l.local_addr()).map(|a| a.port()).expect("a free port")
}

/// Polls `f` every 100 ms until it holds or `within` has passed; the last answer of `f`.
pub fn wait_until(within: Duration, mut f: impl FnMut() -> bool) -> bool {
    let deadline = Instant::now() + within;
    while Instant::now() < deadline {
        if f() {
            return true;
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    f()
}

/// A minimal HTTP/1.1 GET on loopback, with a 5 s read timeout.
pub fn http_get(addr: &str, path: &str) -> std::io::Result<(u16, String)> {
    http::get(addr, path, Duration::from_secs(5))
}
