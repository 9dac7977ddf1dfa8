//! One shutdown signal, observed everywhere.
//!
//! The signal future given to [`crate::app::run`] (SIGTERM or SIGINT for the binary, see
//! [`terminated`]) sets it once; the pipeline thread checks it between polls (it stops
//! consuming, finishes the message in hand, publishes, snapshots and flushes), and async tasks
//! await it. A second signal does nothing more: shutdown is already under way.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

use tokio::sync::Notify;

#[derive(Clone, Default)]
pub struct Shutdown {
    flag: Arc<AtomicBool>,
    notify: Arc<Notify>,
}

impl Shutdown {
    pub fn new() -> Self {
        Self::default()
    }

    pub fn trigger(&self) {
        self.flag.store(true, Ordering::SeqCst);
        self.notify.notify_waiters();
    }

    pub fn is_triggered(&self) -> bool {
        self.flag.load(Ordering::SeqCst)
    }

    /// A future that completes once this is triggered, owning its handle: the signal to give
    /// [`crate::app::run`] when the caller stops things itself (the demo, the tests).
    pub fn triggered(&self) -> impl std::future::Future<Output = ()> + Send + 'static {
        let me = self.clone();
        async move { me.wait().await }
    }

    pub async fn wait(&self) {
        loop {
            let notified = self.notify.notified();
            if self.is_triggered() {
                return;
            }
            notified.await;
        }
    }
}

/// Completes on SIGTERM or SIGINT (Ctrl-C): the signal the binary hands to [`crate::app::run`].
/// If SIGTERM cannot be watched, only Ctrl-C is, and a warning says so.
pub async fn terminated() {
    let ctrl_c = tokio::signal::ctrl_c();
    #[cfg(unix)]
    {
        match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = ctrl_c => {},
                    _ = term.recv() => {},
                }
            }
            Err(e) => {
                tracing::warn!("cannot watch SIGTERM: {e}");
                let _ = ctrl_c.await;
            }
        }
    }
    #[cfg(not(unix))]
    let _ = ctrl_c.await;
}
