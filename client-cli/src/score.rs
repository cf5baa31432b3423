//! `score`: per-frame results against per-frame labels, for raw and smoothed outputs side by side. The
//! metrics are the engine's (`framewise_engine::scoring`); this module reads files and reports.

use std::path::Path;

use anyhow::{Context, Result, bail};
use framewise_engine::CAUTION;
use framewise_engine::scoring::{FrameMetrics, TimeMetrics, argmax, frame_metrics, time_metrics};
use serde::Serialize;

use crate::output::{FrameRecord, Header, table};

/// Reads a results file: its header and frame records.
pub fn read_results(path: &Path) -> Result<(Header, Vec<FrameRecord>)> {
    let text =
        std::fs::read_to_string(path).with_context(|| format!("reading {}", path.display()))?;
    let mut header = None;
    let mut records = Vec::new();
    for (n, line) in text.lines().enumerate() {
        if line.trim().is_empty() {
            continue;
        }
        let value: serde_json::Value = serde_json::from_str(line)
            .with_context(|| format!("{} line {}: not JSON", path.display(), n + 1))?;
        if value["kind"] == "header" {
            header = Some(
                serde_json::from_value(value)
                    .with_context(|| format!("{} line {}: bad header", path.display(), n + 1))?,
            );
        } else {
            records.push(
                serde_json::from_value(value).with_context(|| {
                    format!("{} line {}: bad frame line", path.display(), n + 1)
                })?,
            );
        }
    }
    let header: Header =
        header.with_context(|| format!("{} has no header line", path.display()))?;
    records.sort_by_key(|r: &FrameRecord| r.seq);
    records.dedup_by_key(|r| r.seq);
    Ok((header, records))
}

/// The full report.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Class names.
    pub classes: Vec<String>,
    /// Raw probabilities.
    pub raw: FrameMetrics,
    /// Smoothed probabilities.
    pub smoothed: FrameMetrics,
    /// Per-frame arg-max of raw probabilities, as calls.
    pub raw_calls: TimeMetrics,
    /// The decisions (smoothed with hysteresis).
    pub decisions: TimeMetrics,
    /// Frames with a label and a result.
    pub frames: usize,
    /// Frames without a label or a result (not scored).
    pub unscored: usize,
}

impl Report {
    /// Scores frame records (labels inside them) for these classes.
    pub fn compute(records: &[FrameRecord], classes: &[String]) -> Result<Self> {
        let k = classes.len();
        let index = |name: &str| classes.iter().position(|c| c == name);
        let mut raw = Vec::new();
        let mut smoothed = Vec::new();
        let mut labels = Vec::new();
        let mut times = Vec::new();
        let mut decisions = Vec::new();
        let mut unscored = 0;
        for r in records {
            let label = r.label.as_deref().and_then(index);
            match (label, r.kind.as_str()) {
                (Some(l), "result") if r.raw.len() == k => {
                    raw.push(r.raw.clone());
                    // Before the first usable frame there is no smoothed output: fall back to the raw one.
                    smoothed.push(if r.smoothed.len() == k {
                        r.smoothed.clone()
                    } else {
                        r.raw.clone()
                    });
                    labels.push(l);
                    times.push(r.t_ms);
                    decisions.push(r.decision.as_deref().and_then(index));
                }
                _ => unscored += 1,
            }
        }
        if labels.is_empty() {
            bail!(
                "no frame has both a label and a result: nothing to score (does the recording have a labels.csv?)"
            );
        }
        let raw_calls: Vec<Option<usize>> = raw.iter().map(|p| argmax(p)).collect();
        Ok(Self {
            classes: classes.to_vec(),
            raw: frame_metrics(&raw, &labels, k),
            smoothed: frame_metrics(&smoothed, &labels, k),
            raw_calls: time_metrics(&raw_calls, &labels, &times),
            decisions: time_metrics(&decisions, &labels, &times),
            frames: labels.len(),
            unscored,
        })
    }

    /// The report for people.
    pub fn human(&self) -> String {
        let f = |v: Option<f64>| v.map_or("-".to_string(), |x| format!("{x:.3}"));
        let mut out = String::new();
        out.push_str(&format!(
            "scored frames: {} (unscored: {})\n\n",
            self.frames, self.unscored
        ));
        let rows = vec![
            vec![
                "accuracy (arg-max)".into(),
                format!("{:.3}", self.raw.accuracy),
                format!("{:.3}", self.smoothed.accuracy),
            ],
            vec![
                "calibration error (ECE)".into(),
                format!("{:.3}", self.raw.ece),
                format!("{:.3}", self.smoothed.ece),
            ],
            vec![
                "call accuracy".into(),
                format!("{:.3}", self.raw_calls.call_accuracy),
                format!("{:.3}", self.decisions.call_accuracy),
            ],
            vec![
                "coverage (share called)".into(),
                format!("{:.3}", self.raw_calls.coverage),
                format!("{:.3}", self.decisions.coverage),
            ],
            vec![
                "call changes per minute".into(),
                format!("{:.1}", self.raw_calls.call_changes_per_minute),
                format!("{:.1}", self.decisions.call_changes_per_minute),
            ],
            vec![
                "switches per minute (incl. undetermined)".into(),
                format!("{:.1}", self.raw_calls.switches_per_minute),
                format!("{:.1}", self.decisions.switches_per_minute),
            ],
            vec![
                "false calls per minute".into(),
                format!("{:.1}", self.raw_calls.false_calls_per_minute),
                format!("{:.1}", self.decisions.false_calls_per_minute),
            ],
            vec![
                "median time to correct call (ms)".into(),
                self.raw_calls
                    .median_time_to_correct_ms
                    .map_or("-".into(), |v| format!("{v:.0}")),
                self.decisions
                    .median_time_to_correct_ms
                    .map_or("-".into(), |v| format!("{v:.0}")),
            ],
            vec![
                "segments never called".into(),
                format!(
                    "{}/{}",
                    self.raw_calls.segments_missed, self.raw_calls.segments
                ),
                format!(
                    "{}/{}",
                    self.decisions.segments_missed, self.decisions.segments
                ),
            ],
        ];
        out.push_str(&table(&["metric", "raw", "smoothed"], &rows));
        out.push('\n');
        let rows: Vec<Vec<String>> = self
            .classes
            .iter()
            .enumerate()
            .map(|(c, name)| {
                vec![
                    name.clone(),
                    f(self.raw.sensitivity[c]),
                    f(self.smoothed.sensitivity[c]),
                    f(self.raw.specificity[c]),
                    f(self.smoothed.specificity[c]),
                    f(self.raw.roc_auc[c]),
                    f(self.smoothed.roc_auc[c]),
                ]
            })
            .collect();
        out.push_str(&table(
            &[
                "class",
                "sens raw",
                "sens smooth",
                "spec raw",
                "spec smooth",
                "AUC raw",
                "AUC smooth",
            ],
            &rows,
        ));
        out.push_str("\nconfusion (rows: label, columns: smoothed arg-max)\n");
        let mut headers = vec!["label"];
        headers.extend(self.classes.iter().map(String::as_str));
        let rows: Vec<Vec<String>> = self
            .classes
            .iter()
            .enumerate()
            .map(|(c, name)| {
                let mut row = vec![name.clone()];
                row.extend(self.smoothed.confusion[c].iter().map(|v| v.to_string()));
                row
            })
            .collect();
        out.push_str(&table(&headers, &rows));
        out.push_str(&format!("\ncaution: {CAUTION}"));
        out
    }

    /// The report as JSON, with the caution and the model's identity.
    pub fn json(&self, header: &Header) -> serde_json::Value {
        serde_json::json!({
            "caution": CAUTION,
            "model": header.model,
            "source": header.source,
            "settings": header.settings,
            "report": self,
        })
    }
}

/// One point of a filter sweep.
#[derive(Debug, Clone, Serialize)]
pub struct SweepPoint {
    /// The filter, as `--filter` takes it.
    pub filter: String,
    /// Over-time metrics of the decisions it gives.
    pub decisions: TimeMetrics,
}

/// The filter grid a sweep runs: exponential time constants, window lengths and forward-filter stay
/// probabilities around the usual range for 25 to 60 fps video.
pub fn sweep_grid() -> Vec<String> {
    let mut grid = vec!["none".to_string()];
    grid.extend(
        [100, 200, 300, 500, 800, 1200]
            .iter()
            .map(|t| format!("exp:{t}")),
    );
    grid.extend([3, 5, 10, 20, 40].iter().map(|n| format!("window:{n}")));
    grid.extend(
        ["0.9", "0.95", "0.98", "0.99", "0.995"]
            .iter()
            .map(|s| format!("forward:{s}")),
    );
    grid
}

/// Re-runs temporal filters offline over the stored raw probabilities (the server's filter and decision
/// code), with the decision thresholds given, and scores each.
pub fn sweep(
    records: &[FrameRecord],
    classes: &[String],
    decision: framewise_engine::DecisionSpec,
) -> Result<Vec<SweepPoint>> {
    let index = |name: &str| classes.iter().position(|c| c == name);
    let frames: Vec<(&FrameRecord, usize)> = records
        .iter()
        .filter(|r| r.kind == "result" && r.raw.len() == classes.len())
        .filter_map(|r| r.label.as_deref().and_then(index).map(|l| (r, l)))
        .collect();
    if frames.is_empty() {
        bail!("no frame has both a label and a result: nothing to sweep");
    }
    let labels: Vec<usize> = frames.iter().map(|(_, l)| *l).collect();
    let times: Vec<f64> = frames.iter().map(|(r, _)| r.t_ms).collect();
    let mut points = Vec::new();
    for filter in sweep_grid() {
        let settings = crate::settings::filter_settings(&filter)?;
        let spec = match settings.kind {
            Some(framewise_proto::v1::filter_settings::Kind::Exponential(e)) => {
                framewise_engine::FilterSpec::Exponential { tau_ms: e.tau_ms }
            }
            Some(framewise_proto::v1::filter_settings::Kind::Window(w)) => {
                framewise_engine::FilterSpec::Window {
                    frames: w.frames,
                    span_ms: w.span_ms,
                }
            }
            Some(framewise_proto::v1::filter_settings::Kind::Forward(f)) => {
                framewise_engine::FilterSpec::Forward {
                    stay: f.stay,
                    priors: f.priors,
                    step_ms: framewise_engine::filter::DEFAULT_STEP_MS,
                }
            }
            _ => framewise_engine::FilterSpec::PassThrough,
        };
        let mut filter_state = spec.build(classes.len())?;
        let mut decider = framewise_engine::filter::Decider::new(decision)?;
        let mut calls = Vec::with_capacity(frames.len());
        for (r, _) in &frames {
            let call = if r.usable {
                let smoothed = filter_state.update(r.t_ms, &r.raw).to_vec();
                decider.update(r.t_ms, &smoothed)
            } else {
                decider.current(filter_state.current())
            };
            calls.push(match call {
                framewise_engine::Decision::Class { index, .. } => Some(index),
                framewise_engine::Decision::Undetermined => None,
            });
        }
        points.push(SweepPoint {
            filter,
            decisions: time_metrics(&calls, &labels, &times),
        });
    }
    Ok(points)
}

/// The sweep for people.
pub fn sweep_human(points: &[SweepPoint]) -> String {
    let rows: Vec<Vec<String>> = points
        .iter()
        .map(|p| {
            let d = &p.decisions;
            vec![
                p.filter.clone(),
                d.median_time_to_correct_ms
                    .map_or("-".into(), |v| format!("{v:.0}")),
                format!("{:.1}", d.call_changes_per_minute),
                format!("{:.1}", d.switches_per_minute),
                format!("{:.1}", d.false_calls_per_minute),
                format!("{:.3}", d.call_accuracy),
                format!("{:.3}", d.coverage),
                format!("{}/{}", d.segments_missed, d.segments),
            ]
        })
        .collect();
    let mut out = table(
        &[
            "filter",
            "delay ms (median)",
            "call changes/min",
            "switches/min",
            "false calls/min",
            "call accuracy",
            "coverage",
            "missed",
        ],
        &rows,
    );
    out.push_str(&format!("caution: {CAUTION}"));
    out
}
