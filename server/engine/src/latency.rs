//! Per-stage latency accounting with HdrHistograms (three significant figures, 1 us to 10 min).

use hdrhistogram::Histogram;

/// The stages a frame goes through in the server.
pub const STAGES: [&str; 5] = ["queue", "preprocess", "inference", "filter", "total"];

/// Time spent per stage for one frame, in microseconds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct StageTimings {
    /// Waiting for a worker.
    pub queue_us: u64,
    /// Decoding, cropping, colour conversion, resizing, normalising and quality measures.
    pub preprocess_us: u64,
    /// Running the model.
    pub inference_us: u64,
    /// Temporal filter and decision.
    pub filter_us: u64,
    /// From arrival to the answer.
    pub total_us: u64,
}

impl StageTimings {
    fn values(&self) -> [u64; 5] {
        [
            self.queue_us,
            self.preprocess_us,
            self.inference_us,
            self.filter_us,
            self.total_us,
        ]
    }
}

/// Percentiles of one stage, in microseconds.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Percentiles {
    /// Stage name.
    pub stage: &'static str,
    /// Number of samples.
    pub count: u64,
    /// 50th percentile.
    pub p50: u64,
    /// 90th percentile.
    pub p90: u64,
    /// 99th percentile.
    pub p99: u64,
    /// 99.9th percentile.
    pub p999: u64,
    /// Largest sample.
    pub max: u64,
}

/// Largest recorded value: ten minutes in microseconds; larger values are clamped to it.
pub const MAX_TRACKED_US: u64 = 600_000_000;

/// A latency histogram of microseconds.
pub fn new_histogram() -> Histogram<u64> {
    // 1 us .. 10 min with 3 significant figures: the bounds are constants, so this cannot fail.
    Histogram::new_with_bounds(1, MAX_TRACKED_US, 3).expect("constant histogram bounds are valid")
}

/// Percentiles of a histogram.
pub fn percentiles(stage: &'static str, h: &Histogram<u64>) -> Percentiles {
    Percentiles {
        stage,
        count: h.len(),
        p50: h.value_at_quantile(0.50),
        p90: h.value_at_quantile(0.90),
        p99: h.value_at_quantile(0.99),
        p999: h.value_at_quantile(0.999),
        max: h.max(),
    }
}

/// One histogram per stage.
#[derive(Debug, Clone)]
pub struct LatencyBook {
    stages: Vec<Histogram<u64>>,
}

impl Default for LatencyBook {
    fn default() -> Self {
        Self {
            stages: STAGES.iter().map(|_| new_histogram()).collect(),
        }
    }
}

impl LatencyBook {
    /// An empty book.
    pub fn new() -> Self {
        Self::default()
    }

    /// Records one frame's timings.
    pub fn record(&mut self, t: &StageTimings) {
        for (h, v) in self.stages.iter_mut().zip(t.values()) {
            h.saturating_record(v.clamp(1, MAX_TRACKED_US));
        }
    }

    /// Adds another book's samples.
    pub fn merge(&mut self, other: &LatencyBook) {
        for (h, o) in self.stages.iter_mut().zip(&other.stages) {
            // Same bounds on both sides, so adding cannot fail.
            let _ = h.add(o);
        }
    }

    /// Percentiles per stage.
    pub fn summary(&self) -> Vec<Percentiles> {
        STAGES
            .iter()
            .zip(&self.stages)
            .map(|(s, h)| percentiles(s, h))
            .collect()
    }

    /// The histogram of a stage.
    pub fn stage(&self, name: &str) -> Option<&Histogram<u64>> {
        STAGES
            .iter()
            .position(|s| *s == name)
            .map(|i| &self.stages[i])
    }
}
