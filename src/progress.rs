//! Progress reporting and cancellation shared by long work (loading, phantom, measuring).
//! The app polls a [`Progress`] each frame; the command line prints it to stderr.

use std::sync::Arc;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};

/// A cheap, clonable progress handle: done/total counters and a cancel flag.
#[derive(Clone, Default)]
pub struct Progress {
    inner: Arc<Inner>,
}

#[derive(Default)]
struct Inner {
    done: AtomicU64,
    total: AtomicU64,
    cancel: AtomicBool,
}

impl Progress {
    pub fn new() -> Self {
        Self::default()
    }
    /// Starts a new phase of `total` units.
    pub fn start(&self, total: u64) {
        self.inner.done.store(0, Ordering::Relaxed);
        self.inner.total.store(total, Ordering::Relaxed);
    }
    pub fn add(&self, n: u64) {
        self.inner.done.fetch_add(n, Ordering::Relaxed);
    }
    /// Fraction done in [0, 1].
    pub fn fraction(&self) -> f32 {
        let t = self.inner.total.load(Ordering::Relaxed);
        if t == 0 {
            return 0.0;
        }
        (self.inner.done.load(Ordering::Relaxed) as f32 / t as f32).min(1.0)
    }
    pub fn cancel(&self) {
        self.inner.cancel.store(true, Ordering::Relaxed);
    }
    pub fn cancelled(&self) -> bool {
        self.inner.cancel.load(Ordering::Relaxed)
    }
    /// Err(Cancelled) once cancel was asked for.
    pub fn check(&self) -> crate::Result<()> {
        if self.cancelled() { Err(crate::Error::Cancelled) } else { Ok(()) }
    }
}
