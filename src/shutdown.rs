//! One shutdown signal, observed everywhere.
//!
//! SIGTERM or SIGINT sets it once; the pipeline thread checks it between polls (it stops
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

    pub async fn wait(&self) {
        loop {
            let notified = self.notify.notified();
            if self.is_triggered() {
                return;
            }
            notified.await;
        }
    }

    /// Triggers on SIGTERM or SIGINT.
    pub fn on_signals(&self) {
        let me = self.clone();
        tokio::spawn(async move {
            let ctrl_c = tokio::signal::ctrl_c();
            #[cfg(unix)]
            {
                let mut term = match tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate()) {
                    Ok(s) => s,
                    Err(e) => {
                        tracing::warn!("cannot watch SIGTERM: {e}");
                        let _ = ctrl_c.await;
                        me.trigger();
                        return;
                    }
                };
                tokio::select! {
                    _ = ctrl_c => {},
                    _ = term.recv() => {},
                }
            }
            #[cfg(not(unix))]
            let _ = ctrl_c.await;
            tracing::info!("shutdown requested");
            me.trigger();
        });
    }
}
