//! Server-wide counters and per-stage latency histograms.

use std::sync::Mutex;
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Instant;

use framewise_engine::latency::{LatencyBook, Percentiles, StageTimings};

/// Counters and histograms for the whole server since it started.
#[derive(Debug)]
pub struct ServerStats {
    started: Instant,
    /// Sessions open now.
    pub sessions_open: AtomicU64,
    /// Sessions opened since start.
    pub sessions_total: AtomicU64,
    /// Sessions refused (limit, shutdown, authentication, bad opening).
    pub sessions_refused: AtomicU64,
    /// Frames received.
    pub frames: AtomicU64,
    /// Frames analysed.
    pub results: AtomicU64,
    /// Frames skipped.
    pub skipped: AtomicU64,
    /// Frames answered with an error.
    pub errors: AtomicU64,
    /// Frames past their deadline.
    pub deadline_missed: AtomicU64,
    latency: Mutex<LatencyBook>,
}

impl Default for ServerStats {
    fn default() -> Self {
        Self {
            started: Instant::now(),
            sessions_open: AtomicU64::new(0),
            sessions_total: AtomicU64::new(0),
            sessions_refused: AtomicU64::new(0),
            frames: AtomicU64::new(0),
            results: AtomicU64::new(0),
            skipped: AtomicU64::new(0),
            errors: AtomicU64::new(0),
            deadline_missed: AtomicU64::new(0),
            latency: Mutex::new(LatencyBook::new()),
        }
    }
}

/// A snapshot of the counters.
#[derive(Debug, Clone, Default)]
pub struct StatsSnapshot {
    /// Seconds since start.
    pub uptime_s: f64,
    /// Sessions open.
    pub sessions_open: u64,
    /// Sessions opened.
    pub sessions_total: u64,
    /// Sessions refused.
    pub sessions_refused: u64,
    /// Frames received.
    pub frames: u64,
    /// Frames analysed.
    pub results: u64,
    /// Frames skipped.
    pub skipped: u64,
    /// Frames with errors.
    pub errors: u64,
    /// Frames past their deadline.
    pub deadline_missed: u64,
    /// Latency per stage.
    pub stages: Vec<Percentiles>,
    /// The histograms themselves.
    pub book: LatencyBook,
}

impl ServerStats {
    /// Records one analysed frame's timings.
    pub fn record(&self, timings: &StageTimings) {
        if let Ok(mut book) = self.latency.lock() {
            book.record(timings);
        }
    }

    /// A snapshot.
    pub fn snapshot(&self) -> StatsSnapshot {
        let book = self.latency.lock().map(|b| b.clone()).unwrap_or_default();
        let get = |c: &AtomicU64| c.load(Ordering::Relaxed);
        StatsSnapshot {
            uptime_s: self.started.elapsed().as_secs_f64(),
            sessions_open: get(&self.sessions_open),
            sessions_total: get(&self.sessions_total),
            sessions_refused: get(&self.sessions_refused),
            frames: get(&self.frames),
            results: get(&self.results),
            skipped: get(&self.skipped),
            errors: get(&self.errors),
            deadline_missed: get(&self.deadline_missed),
            stages: book.summary(),
            book,
        }
    }
}

/// Adds one to a counter.
pub fn bump(counter: &AtomicU64) {
    counter.fetch_add(1, Ordering::Relaxed);
}
