//! One frame's path through the engine: decode and prepare (per frame, on a worker), infer (shared plan),
//! then smooth and decide (per stream, in order). The server and the offline paths use these same
//! functions, so a streamed result equals an offline one bit for bit.

use std::sync::Arc;
use std::time::Instant;

use crate::filter::{Decider, Decision, DecisionSpec, FilterSpec, SettingsError, TemporalFilter};
use crate::frame::{
    self, DecodeScratch, FrameError, FrameLimits, FrameRef, Needed, Region, RgbImage, YuvSpec,
};
use crate::latency::StageTimings;
use crate::model::{InferenceError, Model};
use crate::preprocess::{self, Preprocessor};
use crate::quality::{self, QualityMeasures, QualitySpec, QualityVerdict};

/// How a stream's frames are read.
#[derive(Debug, Clone, Copy, PartialEq, Default)]
pub struct FrameSpec {
    /// Region of interest; `None` for the whole frame.
    pub region: Option<Region>,
    /// YUV matrix and range.
    pub yuv: YuvSpec,
    /// Size limits.
    pub limits: FrameLimits,
}

/// Everything a stream sets.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct StreamSettings {
    /// How frames are read.
    pub frame: FrameSpec,
    /// Temporal filter.
    pub filter: FilterSpec,
    /// Decision thresholds.
    pub decision: DecisionSpec,
    /// Quality thresholds.
    pub quality: QualitySpec,
}

impl StreamSettings {
    /// Checks every setting for a model with `classes` classes; the error names the setting.
    pub fn validate(&self, classes: usize) -> Result<(), SettingsError> {
        self.filter.validate(classes)?;
        self.decision.validate()?;
        self.quality.validate()
    }
}

/// Why a frame got no result.
#[derive(Debug, Clone, thiserror::Error)]
#[non_exhaustive]
pub enum AnalysisError {
    /// The frame is malformed.
    #[error(transparent)]
    Frame(#[from] FrameError),
    /// The model failed on it.
    #[error(transparent)]
    Inference(#[from] InferenceError),
}

impl AnalysisError {
    /// A short machine-readable kind.
    pub fn kind(&self) -> &'static str {
        match self {
            Self::Frame(e) => e.kind(),
            Self::Inference(_) => "inference_failed",
        }
    }
}

/// Reusable per-stream buffers for preparing frames.
#[derive(Debug, Default)]
pub struct Scratch {
    decode: DecodeScratch,
    rgb: RgbImage,
    pre: Preprocessor,
    rows: Vec<bool>,
    /// The last prepared input tensor.
    pub tensor: Vec<f32>,
}

/// What preparing and running one frame gave.
#[derive(Debug, Clone, PartialEq)]
pub struct Analysed {
    /// Class probabilities of this frame alone.
    pub raw: Vec<f32>,
    /// Quality measures.
    pub quality: QualityMeasures,
    /// Microseconds spent decoding and preparing.
    pub preprocess_us: u64,
    /// Microseconds spent in the model.
    pub inference_us: u64,
}

/// Decodes the frame, prepares the model's input tensor into `scratch.tensor`, and measures quality.
/// Returns the measures and the microseconds spent.
pub fn prepare(
    model: &Model,
    frame: &FrameRef<'_>,
    spec: &FrameSpec,
    scratch: &mut Scratch,
) -> Result<(QualityMeasures, u64), FrameError> {
    let start = Instant::now();
    let input = &model.manifest().input;
    // Only the rows the resize reads are converted (OpenCV's linear recipes read two per output row), for a
    // raw frame whose declared size is within the limits and holds the region: anything else is refused by
    // `read_rgb` before the mask would matter, and a mask sized from a client's numbers is never made.
    let raw = !frame.format.is_encoded()
        && frame.width <= spec.limits.max_width
        && frame.height <= spec.limits.max_height;
    let size = match spec.region {
        Some(r) if raw => (u64::from(r.x) + u64::from(r.width) <= u64::from(frame.width)
            && u64::from(r.y) + u64::from(r.height) <= u64::from(frame.height))
        .then_some((r.width, r.height)),
        None if raw => Some((frame.width, frame.height)),
        _ => None,
    };
    let sparse = size.is_some_and(|(w, h)| preprocess::rows_read(input, w, h, &mut scratch.rows));
    let needed = Needed::rows(sparse.then_some(scratch.rows.as_slice()));
    // A packed RGB8 frame taken whole is read where it lies; every other frame is converted first.
    let rgb = frame::read_rgb(
        frame,
        spec.region,
        spec.yuv,
        &spec.limits,
        &mut scratch.decode,
        &mut scratch.rgb,
        &needed,
    )?;
    let prepared = scratch.pre.prepare_view(input, rgb, &mut scratch.tensor);
    let (w, h) = prepared.size;
    let measures = quality::measure(prepared.luma, w as usize, h as usize);
    Ok((measures, micros_since(start)))
}

/// Prepares and runs one frame.
pub fn analyse(
    model: &Model,
    frame: &FrameRef<'_>,
    spec: &FrameSpec,
    scratch: &mut Scratch,
) -> Result<Analysed, AnalysisError> {
    let (quality, preprocess_us) = prepare(model, frame, spec, scratch)?;
    let start = Instant::now();
    let raw = model.infer(&scratch.tensor)?;
    Ok(Analysed {
        raw,
        quality,
        preprocess_us,
        inference_us: micros_since(start),
    })
}

/// Microseconds since `start`, at least 1 (a stage that ran took some time).
pub fn micros_since(start: Instant) -> u64 {
    (start.elapsed().as_micros() as u64).max(1)
}

/// The temporal part of a stream: filter, decision and quality gate, fed in capture order.
#[derive(Debug, Clone)]
pub struct Smoother {
    filter: TemporalFilter,
    decider: Decider,
    quality: QualitySpec,
}

/// What the smoother made of a frame.
#[derive(Debug, Clone, PartialEq)]
pub struct Smoothed {
    /// Smoothed probabilities; empty until a usable frame arrived.
    pub smoothed: Vec<f32>,
    /// Decision after hysteresis.
    pub decision: Decision,
    /// Quality verdict.
    pub verdict: QualityVerdict,
}

impl Smoother {
    /// A smoother for a model with `classes` classes.
    pub fn new(settings: &StreamSettings, classes: usize) -> Result<Self, SettingsError> {
        settings.validate(classes)?;
        Ok(Self {
            filter: settings.filter.build(classes)?,
            decider: Decider::new(settings.decision)?,
            quality: settings.quality,
        })
    }

    /// Folds in one analysed frame captured at `t_ms`. An unusable frame leaves the filter and the
    /// decision as they were.
    pub fn smooth(&mut self, t_ms: f64, raw: &[f32], quality: &QualityMeasures) -> Smoothed {
        let verdict = self.quality.judge(quality);
        if !verdict.usable {
            let smoothed = self.filter.current().to_vec();
            let decision = self.decider.current(&smoothed);
            return Smoothed {
                smoothed,
                decision,
                verdict,
            };
        }
        let smoothed = self.filter.update(t_ms, raw).to_vec();
        let decision = self.decider.update(t_ms, &smoothed);
        Smoothed {
            smoothed,
            decision,
            verdict,
        }
    }
}

/// A frame's full outcome, as the offline paths produce it.
#[derive(Debug, Clone, PartialEq)]
pub struct Outcome {
    /// Raw probabilities, quality and stage times.
    pub analysed: Analysed,
    /// Smoothed probabilities, decision and verdict.
    pub smoothed: Smoothed,
    /// Stage timings (queue is 0 offline).
    pub timings: StageTimings,
}

/// The offline engine for one stream: the same functions the server runs, in one thread.
#[derive(Debug)]
pub struct Analyser {
    model: Arc<Model>,
    spec: FrameSpec,
    scratch: Scratch,
    smoother: Smoother,
}

impl Analyser {
    /// An analyser for `model` with `settings`.
    pub fn new(model: Arc<Model>, settings: &StreamSettings) -> Result<Self, SettingsError> {
        let smoother = Smoother::new(settings, model.classes().len())?;
        Ok(Self {
            model,
            spec: settings.frame,
            scratch: Scratch::default(),
            smoother,
        })
    }

    /// The model.
    pub fn model(&self) -> &Arc<Model> {
        &self.model
    }

    /// Analyses one frame captured at `t_ms`.
    pub fn analyse(&mut self, frame: &FrameRef<'_>, t_ms: f64) -> Result<Outcome, AnalysisError> {
        let start = Instant::now();
        let analysed = analyse(&self.model, frame, &self.spec, &mut self.scratch)?;
        let filter_start = Instant::now();
        let smoothed = self.smoother.smooth(t_ms, &analysed.raw, &analysed.quality);
        let timings = StageTimings {
            queue_us: 0,
            preprocess_us: analysed.preprocess_us,
            inference_us: analysed.inference_us,
            filter_us: micros_since(filter_start),
            total_us: micros_since(start),
        };
        Ok(Outcome {
            analysed,
            smoothed,
            timings,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::quality::QualityMeasures;

    #[test]
    fn an_unusable_frame_does_not_move_the_filter_or_the_decision() {
        let settings = StreamSettings {
            filter: FilterSpec::PassThrough,
            decision: DecisionSpec {
                enter: 0.6,
                exit: 0.4,
                dwell_ms: 0.0,
            },
            quality: QualitySpec {
                min_focus: 10.0,
                max_clipped: 0.5,
            },
            ..Default::default()
        };
        let mut s = Smoother::new(&settings, 2).expect("valid");
        let sharp = QualityMeasures {
            focus: 100.0,
            dark_share: 0.0,
            bright_share: 0.0,
        };
        let first = s.smooth(0.0, &[0.9, 0.1], &sharp);
        assert_eq!(
            first.decision,
            Decision::Class {
                index: 0,
                confidence: 0.9
            }
        );
        let glare = QualityMeasures {
            focus: 100.0,
            dark_share: 0.0,
            bright_share: 0.8,
        };
        let during = s.smooth(33.0, &[0.0, 1.0], &glare);
        assert!(!during.verdict.usable && during.verdict.badly_exposed);
        assert_eq!(during.smoothed, vec![0.9, 0.1], "the filter kept its state");
        assert_eq!(
            during.decision,
            Decision::Class {
                index: 0,
                confidence: 0.9
            }
        );
        let blurred = QualityMeasures {
            focus: 1.0,
            dark_share: 0.0,
            bright_share: 0.0,
        };
        assert!(s.smooth(66.0, &[0.0, 1.0], &blurred).verdict.blurred);
        let after = s.smooth(100.0, &[0.2, 0.8], &sharp);
        assert_eq!(after.smoothed, vec![0.2, 0.8]);
    }
}
