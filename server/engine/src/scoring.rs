//! Scoring per-frame outputs against per-frame labels, as the literature and scikit-learn define it.
//!
//! Accuracy is the share of frames whose arg-max class equals the label; sensitivity TP/(TP+FN) and
//! specificity TN/(TN+FP) per class, one-vs-rest; ROC AUC one-vs-rest per class by the Mann-Whitney statistic
//! with ties counted half (equal to `sklearn.metrics.roc_auc_score`); expected calibration error over 10
//! equal-width bins of the top-class probability (binned as `sklearn.calibration.calibration_curve`),
//! weighted by bin size. Over time: a switch is any change of the called value between frames; a false call
//! is a call whose class differs from the label when it starts; time to first correct call is measured from
//! the start of each labelled segment.

use serde::Serialize;

/// Number of equal-width bins for the calibration error.
pub const CALIBRATION_BINS: usize = 10;

/// Metrics of one output (raw or smoothed).
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct FrameMetrics {
    /// Frames scored.
    pub frames: usize,
    /// Share of frames whose arg-max is the label.
    pub accuracy: f64,
    /// Per class: sensitivity.
    pub sensitivity: Vec<Option<f64>>,
    /// Per class: specificity.
    pub specificity: Vec<Option<f64>>,
    /// Per class: one-vs-rest ROC AUC (None when a class has no positives or no negatives).
    pub roc_auc: Vec<Option<f64>>,
    /// Rows: true class; columns: arg-max class.
    pub confusion: Vec<Vec<u64>>,
    /// Expected calibration error (10 equal-width bins of the top probability).
    pub ece: f64,
    /// The reliability diagram's bins.
    pub calibration: Vec<CalibrationBin>,
}

/// Over-time metrics of a sequence of calls.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct TimeMetrics {
    /// Changes of the called value per minute, undetermined included as a value (every visible flicker).
    pub switches_per_minute: f64,
    /// Changes from one called class to another per minute, undetermined frames in between skipped.
    pub call_changes_per_minute: f64,
    /// Calls that start on a class other than the label, per minute.
    pub false_calls_per_minute: f64,
    /// Median time from a labelled segment's start to the first correct call, ms (None if never).
    pub median_time_to_correct_ms: Option<f64>,
    /// Segments never called correctly.
    pub segments_missed: usize,
    /// Labelled segments.
    pub segments: usize,
    /// Share of frames whose call equals the label (undetermined counts as not equal).
    pub call_accuracy: f64,
    /// Share of frames with a call.
    pub coverage: f64,
}

/// Index of the largest value; the first one on ties (as NumPy's `argmax`).
pub fn argmax(p: &[f32]) -> Option<usize> {
    let mut best: Option<(usize, f32)> = None;
    for (i, &v) in p.iter().enumerate() {
        if best.is_none_or(|(_, b)| v > b) {
            best = Some((i, v));
        }
    }
    best.map(|(i, _)| i)
}

/// One-vs-rest ROC AUC by the Mann-Whitney statistic with average ranks for ties.
pub fn roc_auc(scores: &[f64], positive: &[bool]) -> Option<f64> {
    let n_pos = positive.iter().filter(|&&p| p).count();
    let n_neg = positive.len() - n_pos;
    if n_pos == 0 || n_neg == 0 {
        return None;
    }
    let mut order: Vec<usize> = (0..scores.len()).collect();
    order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]));
    let mut ranks = vec![0.0; scores.len()];
    let mut i = 0;
    while i < order.len() {
        let mut j = i;
        while j + 1 < order.len() && scores[order[j + 1]] == scores[order[i]] {
            j += 1;
        }
        let rank = (i + j) as f64 / 2.0 + 1.0;
        for k in i..=j {
            ranks[order[k]] = rank;
        }
        i = j + 1;
    }
    let pos_rank_sum: f64 = ranks
        .iter()
        .zip(positive)
        .filter(|(_, p)| **p)
        .map(|(r, _)| r)
        .sum();
    let u = pos_rank_sum - (n_pos * (n_pos + 1)) as f64 / 2.0;
    Some(u / (n_pos * n_neg) as f64)
}

/// One bin of a reliability diagram.
#[derive(Debug, Clone, Copy, Serialize, PartialEq)]
pub struct CalibrationBin {
    /// Frames in the bin.
    pub count: usize,
    /// Mean top-class probability of those frames.
    pub mean_confidence: f64,
    /// Share of those frames whose top class is right.
    pub accuracy: f64,
}

/// Equal-width bins of top-class probabilities with their accuracy (empty bins have a count of 0), binned as
/// scikit-learn's calibration_curve does (np.linspace edges, np.searchsorted on the inner edges).
pub fn calibration_bins(confidence: &[f64], correct: &[bool], bins: usize) -> Vec<CalibrationBin> {
    let mut sum_conf = vec![0.0; bins];
    let mut sum_acc = vec![0.0; bins];
    let mut count = vec![0usize; bins];
    let step = 1.0 / bins as f64;
    for (c, ok) in confidence.iter().zip(correct) {
        let b = (1..bins).filter(|&k| k as f64 * step < *c).count();
        sum_conf[b] += c;
        sum_acc[b] += f64::from(u8::from(*ok));
        count[b] += 1;
    }
    (0..bins)
        .map(|b| {
            let n = count[b].max(1) as f64;
            CalibrationBin {
                count: count[b],
                mean_confidence: sum_conf[b] / n,
                accuracy: sum_acc[b] / n,
            }
        })
        .collect()
}

/// Expected calibration error of top-class probabilities over equal-width bins.
pub fn expected_calibration_error(confidence: &[f64], correct: &[bool], bins: usize) -> f64 {
    let n = confidence.len();
    if n == 0 {
        return 0.0;
    }
    calibration_bins(confidence, correct, bins)
        .iter()
        .filter(|b| b.count > 0)
        .map(|b| (b.count as f64 / n as f64) * (b.accuracy - b.mean_confidence).abs())
        .sum()
}

/// Frame-level metrics of probability vectors against label indices.
#[allow(clippy::needless_range_loop)] // c indexes rows and columns of the confusion matrix alike
pub fn frame_metrics(probs: &[Vec<f32>], labels: &[usize], k: usize) -> FrameMetrics {
    let n = labels.len();
    let mut confusion = vec![vec![0u64; k]; k];
    let mut correct = Vec::with_capacity(n);
    let mut confidence = Vec::with_capacity(n);
    for (p, &l) in probs.iter().zip(labels) {
        let pred = argmax(p).unwrap_or(0);
        if l < k && pred < k {
            confusion[l][pred] += 1;
        }
        correct.push(pred == l);
        confidence.push(p.get(pred).map_or(0.0, |&v| f64::from(v)));
    }
    let total: u64 = confusion.iter().flatten().sum();
    let mut sensitivity = Vec::new();
    let mut specificity = Vec::new();
    let mut roc = Vec::new();
    for c in 0..k {
        let tp = confusion[c][c];
        let fn_: u64 = confusion[c].iter().sum::<u64>() - tp;
        let fp: u64 = (0..k).map(|r| confusion[r][c]).sum::<u64>() - tp;
        let tn = total - tp - fn_ - fp;
        sensitivity.push((tp + fn_ > 0).then(|| tp as f64 / (tp + fn_) as f64));
        specificity.push((tn + fp > 0).then(|| tn as f64 / (tn + fp) as f64));
        let scores: Vec<f64> = probs
            .iter()
            .map(|p| p.get(c).map_or(0.0, |&v| f64::from(v)))
            .collect();
        let positive: Vec<bool> = labels.iter().map(|&l| l == c).collect();
        roc.push(roc_auc(&scores, &positive));
    }
    FrameMetrics {
        frames: n,
        accuracy: if n > 0 {
            correct.iter().filter(|&&c| c).count() as f64 / n as f64
        } else {
            0.0
        },
        sensitivity,
        specificity,
        roc_auc: roc,
        confusion,
        ece: expected_calibration_error(&confidence, &correct, CALIBRATION_BINS),
        calibration: calibration_bins(&confidence, &correct, CALIBRATION_BINS),
    }
}

/// Over-time metrics of calls (None: undetermined) against labels at times `t_ms`.
pub fn time_metrics(calls: &[Option<usize>], labels: &[usize], t_ms: &[f64]) -> TimeMetrics {
    let n = calls.len();
    let minutes = if n > 1 {
        ((t_ms[n - 1] - t_ms[0]) / 60_000.0).max(1e-9)
    } else {
        1e-9
    };
    let mut switches = 0usize;
    let mut call_changes = 0usize;
    let mut last_call: Option<usize> = None;
    let mut false_calls = 0usize;
    for i in 0..n {
        if i > 0 && calls[i] != calls[i - 1] {
            switches += 1;
        }
        if let Some(c) = calls[i] {
            if last_call.is_some_and(|l| l != c) {
                call_changes += 1;
            }
            last_call = Some(c);
        }
        let starts = calls[i].is_some() && (i == 0 || calls[i] != calls[i - 1]);
        if starts && calls[i] != Some(labels[i]) {
            false_calls += 1;
        }
    }
    let mut delays = Vec::new();
    let mut segments = 0;
    let mut missed = 0;
    let mut i = 0;
    while i < n {
        let mut j = i;
        while j + 1 < n && labels[j + 1] == labels[i] {
            j += 1;
        }
        segments += 1;
        match (i..=j).find(|&f| calls[f] == Some(labels[i])) {
            Some(f) => delays.push(t_ms[f] - t_ms[i]),
            None => missed += 1,
        }
        i = j + 1;
    }
    delays.sort_by(f64::total_cmp);
    let median = (!delays.is_empty()).then(|| {
        let m = delays.len() / 2;
        if delays.len() % 2 == 0 {
            (delays[m - 1] + delays[m]) / 2.0
        } else {
            delays[m]
        }
    });
    let hits = calls
        .iter()
        .zip(labels)
        .filter(|(c, l)| **c == Some(**l))
        .count();
    let covered = calls.iter().filter(|c| c.is_some()).count();
    TimeMetrics {
        switches_per_minute: switches as f64 / minutes,
        call_changes_per_minute: call_changes as f64 / minutes,
        false_calls_per_minute: false_calls as f64 / minutes,
        median_time_to_correct_ms: median,
        segments_missed: missed,
        segments,
        call_accuracy: if n > 0 { hits as f64 / n as f64 } else { 0.0 },
        coverage: if n > 0 {
            covered as f64 / n as f64
        } else {
            0.0
        },
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn auc_handles_ties_like_the_mann_whitney_statistic() {
        // Worked example (Hanley & McNeil 1982 definition): positives {0.8, 0.4}, negatives {0.4, 0.1}:
        // pairs (0.8>0.4)=1, (0.8>0.1)=1, (0.4=0.4)=0.5, (0.4>0.1)=1 -> 3.5/4.
        let auc = roc_auc(&[0.8, 0.4, 0.4, 0.1], &[true, true, false, false]);
        assert_eq!(auc, Some(0.875));
        assert_eq!(roc_auc(&[0.1, 0.2], &[true, true]), None);
    }

    #[test]
    fn time_metrics_count_switches_and_delays() {
        let calls = [None, Some(0), Some(0), Some(1), Some(1), Some(1)];
        let labels = [0, 0, 0, 1, 1, 1];
        let t: Vec<f64> = (0..6).map(|i| i as f64 * 12_000.0).collect();
        let m = time_metrics(&calls, &labels, &t);
        assert_eq!(m.switches_per_minute, 2.0);
        assert_eq!(m.call_changes_per_minute, 1.0);
        assert_eq!(m.false_calls_per_minute, 0.0);
        assert_eq!(m.median_time_to_correct_ms, Some(6_000.0));
        assert_eq!(m.segments, 2);
    }
}
