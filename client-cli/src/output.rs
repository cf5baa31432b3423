//! What the client writes: JSON Lines with a header object first (caution, model identity, settings), one
//! object per frame, and aligned tables for people.

use std::io::Write;

use framewise_engine::CAUTION;
use framewise_proto::v1 as pb;
use serde::{Deserialize, Serialize};

/// The header line of every JSON Lines file the client writes.
#[derive(Debug, Clone, Serialize, Deserialize)]
pub struct Header {
    /// Always "header".
    pub kind: String,
    /// The caution.
    pub caution: String,
    /// framewise version that wrote the file.
    pub framewise: String,
    /// The model's identity.
    pub model: ModelInfo,
    /// Class names in probability order.
    pub classes: Vec<String>,
    /// The model's own caution.
    #[serde(default)]
    pub model_caution: String,
    /// What was replayed.
    pub source: String,
    /// Where it ran: a server URL, or "offline".
    pub engine_at: String,
    /// Settings in force.
    pub settings: serde_json::Value,
}

/// A model's identity.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct ModelInfo {
    /// Name.
    pub name: String,
    /// Version.
    pub version: String,
    /// SHA-256 of the ONNX file.
    pub sha256: String,
    /// Inference engine.
    pub engine: String,
    /// What the package's self-test showed where the model ran.
    #[serde(default)]
    pub self_test: SelfTestInfo,
}

/// A package's self-test on the host that ran the model.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct SelfTestInfo {
    /// "passed", "failed" or "none".
    pub verdict: String,
    /// Cases run.
    pub cases: u32,
    /// Cases beyond the tolerance.
    pub failed: u32,
    /// Largest |probability - expected|.
    pub largest_deviation: f64,
    /// The package's tolerance.
    pub tolerance: f64,
}

impl SelfTestInfo {
    /// One line for people: `passed (0 of 6 cases beyond the tolerance 1e-4, largest deviation 1.5e-7)`.
    pub fn summary(&self) -> String {
        match self.verdict.as_str() {
            "passed" | "failed" => format!(
                "{} ({} of {} cases beyond the tolerance {:.0e}, largest deviation {:.1e})",
                if self.verdict == "passed" {
                    "passed"
                } else {
                    "FAILED"
                },
                self.failed,
                self.cases,
                self.tolerance,
                self.largest_deviation
            ),
            "" => "not reported".into(),
            "not run" => "not run on this load".into(),
            _ => "none (no reference cases in the package)".into(),
        }
    }
}

impl From<&pb::SelfTestReport> for SelfTestInfo {
    fn from(r: &pb::SelfTestReport) -> Self {
        Self {
            verdict: r.verdict.clone(),
            cases: r.cases,
            failed: r.failed,
            largest_deviation: r.largest_deviation,
            tolerance: r.tolerance,
        }
    }
}

impl From<&framewise_engine::SelfTestOutcome> for SelfTestInfo {
    fn from(outcome: &framewise_engine::SelfTestOutcome) -> Self {
        (&framewise_server::convert::self_test_report(outcome)).into()
    }
}

impl From<&pb::ModelIdentity> for ModelInfo {
    fn from(m: &pb::ModelIdentity) -> Self {
        Self {
            name: m.name.clone(),
            version: m.version.clone(),
            sha256: m.sha256.clone(),
            engine: m.engine.clone(),
            self_test: m
                .self_test
                .as_ref()
                .map(SelfTestInfo::from)
                .unwrap_or_default(),
        }
    }
}

impl From<&framewise_engine::ModelIdentity> for ModelInfo {
    fn from(id: &framewise_engine::ModelIdentity) -> Self {
        Self {
            name: id.name.clone(),
            version: id.version.clone(),
            sha256: id.sha256.clone(),
            engine: id.engine.into(),
            self_test: (&id.self_test).into(),
        }
    }
}

/// Stage timings in microseconds.
#[derive(Debug, Clone, Copy, Default, Serialize, Deserialize, PartialEq, Eq)]
pub struct Timings {
    /// Waiting for a worker.
    pub queue: u64,
    /// Decode and preprocess.
    pub preprocess: u64,
    /// Inference.
    pub inference: u64,
    /// Filter and decision.
    pub filter: u64,
    /// Total in the server (or the offline engine).
    pub total: u64,
}

/// One frame's line.
#[derive(Debug, Clone, Default, Serialize, Deserialize, PartialEq)]
pub struct FrameRecord {
    /// "result", "skipped" or "error".
    pub kind: String,
    /// Sequence number (the frame's index in the recording).
    pub seq: u64,
    /// Frame file or number.
    pub name: String,
    /// Capture time in milliseconds.
    pub t_ms: f64,
    /// The recording's label, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub label: Option<String>,
    /// Raw probabilities.
    #[serde(default)]
    pub raw: Vec<f32>,
    /// Smoothed probabilities.
    #[serde(default)]
    pub smoothed: Vec<f32>,
    /// Called class, if any.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub decision: Option<String>,
    /// Smoothed probability of the called class.
    #[serde(default)]
    pub confidence: f32,
    /// Whether the frame passed the quality gate.
    #[serde(default)]
    pub usable: bool,
    /// Focus measure.
    #[serde(default)]
    pub focus: f64,
    /// Clipped share (dark + bright).
    #[serde(default)]
    pub clipped: f64,
    /// Stage timings.
    #[serde(default)]
    pub timings_us: Timings,
    /// End-to-end latency seen by the client, microseconds (0 offline).
    #[serde(default)]
    pub round_trip_us: u64,
    /// Error message for "error" lines.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub error: Option<String>,
}

impl FrameRecord {
    /// A record from a server answer.
    pub fn from_answer(a: &pb::Answer, name: String, t_ms: f64, label: Option<String>) -> Self {
        let mut r = FrameRecord {
            seq: a.seq,
            name,
            t_ms,
            label,
            ..Default::default()
        };
        match &a.outcome {
            Some(pb::answer::Outcome::Result(res)) => {
                r.kind = "result".into();
                r.raw = res.raw.clone();
                r.smoothed = res.smoothed.clone();
                if let Some(d) = &res.decision
                    && d.determined
                {
                    r.decision = Some(d.class_name.clone());
                    r.confidence = d.confidence;
                }
                if let Some(q) = &res.quality {
                    r.usable = q.usable;
                    r.focus = q.focus;
                    r.clipped = q.dark_share + q.bright_share;
                }
                if let Some(t) = &res.timings {
                    r.timings_us = Timings {
                        queue: t.queue_us,
                        preprocess: t.preprocess_us,
                        inference: t.inference_us,
                        filter: t.filter_us,
                        total: t.total_us,
                    };
                }
            }
            Some(pb::answer::Outcome::Skipped(s)) => {
                r.kind = "skipped".into();
                r.error = Some(format!("overtaken by frame {}", s.overtaken_by));
            }
            Some(pb::answer::Outcome::Error(e)) => {
                r.kind = "error".into();
                r.error = Some(format!("{}: {}", e.kind, e.message));
            }
            None => {
                r.kind = "error".into();
                r.error = Some("the answer had no outcome".into());
            }
        }
        r
    }
}

/// Writes one JSON line and flushes it, so that a killed process leaves whole lines.
pub fn write_line<W: Write, T: Serialize>(out: &mut W, value: &T) -> std::io::Result<()> {
    let mut line = serde_json::to_vec(value).map_err(std::io::Error::other)?;
    line.push(b'\n');
    out.write_all(&line)?;
    out.flush()
}

/// Writes the CSV file's top: comment lines with the caution, the model identity and the settings, then the
/// column names (raw and smoothed probability per class).
pub fn write_csv_header<W: Write>(out: &mut W, header: &Header) -> std::io::Result<()> {
    let m = &header.model;
    let mut text = format!("# {}\n", header.caution);
    text.push_str(&format!(
        "# model {} {} sha256 {} engine {}; self-test {}\n",
        m.name,
        m.version,
        m.sha256,
        m.engine,
        m.self_test.summary()
    ));
    text.push_str(&format!(
        "# source {}; engine at {}; settings {}\n",
        header.source, header.engine_at, header.settings
    ));
    let mut columns: Vec<String> = [
        "seq",
        "name",
        "t_ms",
        "label",
        "kind",
        "decision",
        "confidence",
        "usable",
        "focus",
        "clipped",
        "total_us",
        "round_trip_us",
    ]
    .iter()
    .map(|c| c.to_string())
    .collect();
    columns.extend(header.classes.iter().map(|c| format!("raw_{c}")));
    columns.extend(header.classes.iter().map(|c| format!("smoothed_{c}")));
    columns.push("error".into());
    text.push_str(&columns.join(","));
    text.push('\n');
    out.write_all(text.as_bytes())?;
    out.flush()
}

/// Quotes a CSV field when it needs it (RFC 4180).
fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// Writes one frame as a CSV row (probability columns for `classes` classes, empty when the frame has none)
/// and flushes it.
pub fn write_csv_row<W: Write>(
    out: &mut W,
    r: &FrameRecord,
    classes: usize,
) -> std::io::Result<()> {
    let mut fields = vec![
        r.seq.to_string(),
        csv_field(&r.name),
        format!("{}", r.t_ms),
        csv_field(r.label.as_deref().unwrap_or("")),
        r.kind.clone(),
        csv_field(r.decision.as_deref().unwrap_or("")),
        format!("{}", r.confidence),
        r.usable.to_string(),
        format!("{}", r.focus),
        format!("{}", r.clipped),
        r.timings_us.total.to_string(),
        r.round_trip_us.to_string(),
    ];
    for probs in [&r.raw, &r.smoothed] {
        fields
            .extend((0..classes).map(|c| probs.get(c).map(|p| format!("{p}")).unwrap_or_default()));
    }
    fields.push(csv_field(r.error.as_deref().unwrap_or("")));
    let mut line = fields.join(",");
    line.push('\n');
    out.write_all(line.as_bytes())?;
    out.flush()
}

/// Prints an aligned table: a header row, then rows.
pub fn table(headers: &[&str], rows: &[Vec<String>]) -> String {
    let mut widths: Vec<usize> = headers.iter().map(|h| h.chars().count()).collect();
    for row in rows {
        for (i, cell) in row.iter().enumerate() {
            if i < widths.len() {
                widths[i] = widths[i].max(cell.chars().count());
            }
        }
    }
    let fmt_row = |cells: Vec<&str>| -> String {
        cells
            .iter()
            .enumerate()
            .map(|(i, c)| {
                let pad = widths[i].saturating_sub(c.chars().count());
                if i == 0 {
                    format!("{c}{}", " ".repeat(pad))
                } else {
                    format!("{}{c}", " ".repeat(pad))
                }
            })
            .collect::<Vec<_>>()
            .join("  ")
    };
    let mut out = fmt_row(headers.to_vec());
    out.push('\n');
    for row in rows {
        out.push_str(&fmt_row(row.iter().map(String::as_str).collect()));
        out.push('\n');
    }
    out
}

/// The caution line for human output.
pub fn caution_line() -> String {
    format!("caution: {CAUTION}")
}
