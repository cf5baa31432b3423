//! Mapping between the wire contract and the engine's types, in one place.

use framewise_engine::filter::{DEFAULT_STEP_MS, Decision};
use framewise_engine::latency::{Percentiles, StageTimings};
use framewise_engine::manifest::{ColourOrder, Layout, OutputKind, ResizeRule};
use framewise_engine::quality::{QualityMeasures, QualityVerdict};
use framewise_engine::{
    CAUTION, DecisionSpec, FilterSpec, FrameLimits, FrameSpec, Model, PixelFormat, QualitySpec,
    Region, SelfTestOutcome, StreamSettings, YuvMatrix, YuvRange, YuvSpec,
};
use framewise_proto::v1 as pb;

/// A session opening that cannot be used; names the field.
#[derive(Debug, thiserror::Error)]
#[error("session opening field `{field}` {problem}")]
pub struct OpeningError {
    /// The field.
    pub field: String,
    /// What is wrong.
    pub problem: String,
}

/// Longest accepted source label.
pub const MAX_SOURCE_LABEL: usize = 128;

/// The frame policy.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FramePolicy {
    /// Lossless, in order.
    EveryFrame,
    /// At most one frame waits; older waiting frames are skipped.
    LatestOnly,
}

/// What a session opening asks for, checked and with defaults applied.
#[derive(Debug, Clone)]
pub struct SessionPlan {
    /// Engine settings.
    pub settings: StreamSettings,
    /// Format of frames that do not say.
    pub default_format: Option<PixelFormat>,
    /// Frame policy.
    pub policy: FramePolicy,
    /// Deadline in microseconds; 0 for none.
    pub deadline_us: u64,
    /// Source label.
    pub source_label: String,
}

/// Wire pixel format to engine format; `None` for unspecified.
pub fn pixel_format(value: i32) -> Result<Option<PixelFormat>, i32> {
    use pb::PixelFormat as P;
    let format = P::try_from(value).map_err(|_| value)?;
    Ok(match format {
        P::Unspecified => None,
        P::Rgb8 => Some(PixelFormat::Rgb8),
        P::Bgr8 => Some(PixelFormat::Bgr8),
        P::Rgba8 => Some(PixelFormat::Rgba8),
        P::Bgra8 => Some(PixelFormat::Bgra8),
        P::Gray8 => Some(PixelFormat::Gray8),
        P::Nv12 => Some(PixelFormat::Nv12),
        P::I420 => Some(PixelFormat::I420),
        P::Yuyv => Some(PixelFormat::Yuyv),
        P::Uyvy => Some(PixelFormat::Uyvy),
        P::I422 => Some(PixelFormat::I422),
        P::I444 => Some(PixelFormat::I444),
        P::Png => Some(PixelFormat::Png),
        P::Jpeg => Some(PixelFormat::Jpeg),
    })
}

/// Engine pixel format to the wire's.
pub fn wire_format(format: PixelFormat) -> pb::PixelFormat {
    use pb::PixelFormat as P;
    match format {
        PixelFormat::Rgb8 => P::Rgb8,
        PixelFormat::Bgr8 => P::Bgr8,
        PixelFormat::Rgba8 => P::Rgba8,
        PixelFormat::Bgra8 => P::Bgra8,
        PixelFormat::Gray8 => P::Gray8,
        PixelFormat::Nv12 => P::Nv12,
        PixelFormat::I420 => P::I420,
        PixelFormat::Yuyv => P::Yuyv,
        PixelFormat::Uyvy => P::Uyvy,
        PixelFormat::I422 => P::I422,
        PixelFormat::I444 => P::I444,
        PixelFormat::Png => P::Png,
        PixelFormat::Jpeg => P::Jpeg,
    }
}

fn opening_error(field: &str, problem: impl Into<String>) -> OpeningError {
    OpeningError {
        field: field.into(),
        problem: problem.into(),
    }
}

/// Checks a session opening against a model and applies defaults.
pub fn session_plan(
    opening: &pb::SessionOpening,
    model: &Model,
    limits: FrameLimits,
) -> Result<SessionPlan, OpeningError> {
    let default_format = pixel_format(opening.default_format).map_err(|v| {
        opening_error(
            "default_format",
            format!("is {v}, not a known pixel format"),
        )
    })?;
    let matrix = match pb::YuvMatrix::try_from(opening.yuv_matrix) {
        Ok(pb::YuvMatrix::Unspecified | pb::YuvMatrix::Bt601) => YuvMatrix::Bt601,
        Ok(pb::YuvMatrix::Bt709) => YuvMatrix::Bt709,
        Err(_) => {
            return Err(opening_error(
                "yuv_matrix",
                format!("is {}, not a known matrix", opening.yuv_matrix),
            ));
        }
    };
    let range = match pb::YuvRange::try_from(opening.yuv_range) {
        Ok(pb::YuvRange::Unspecified | pb::YuvRange::Limited) => YuvRange::Limited,
        Ok(pb::YuvRange::Full) => YuvRange::Full,
        Err(_) => {
            return Err(opening_error(
                "yuv_range",
                format!("is {}, not a known range", opening.yuv_range),
            ));
        }
    };
    let region = match &opening.region {
        Some(r) if r.width == 0 || r.height == 0 => {
            return Err(opening_error(
                "region",
                format!(
                    "is {}x{}; width and height must be at least 1",
                    r.width, r.height
                ),
            ));
        }
        Some(r)
            if u64::from(r.x) + u64::from(r.width) > u64::from(limits.max_width)
                || u64::from(r.y) + u64::from(r.height) > u64::from(limits.max_height) =>
        {
            return Err(opening_error(
                "region",
                format!(
                    "is {}x{}+{}+{}, beyond the largest frame this server takes ({}x{}); give a region \
                     inside the frame",
                    r.width, r.height, r.x, r.y, limits.max_width, limits.max_height
                ),
            ));
        }
        Some(r) => Some(Region {
            x: r.x,
            y: r.y,
            width: r.width,
            height: r.height,
        }),
        None => None,
    };
    let filter = match opening.filter.as_ref().and_then(|f| f.kind.as_ref()) {
        None => FilterSpec::default(),
        Some(pb::filter_settings::Kind::PassThrough(_)) => FilterSpec::PassThrough,
        Some(pb::filter_settings::Kind::Exponential(e)) => {
            FilterSpec::Exponential { tau_ms: e.tau_ms }
        }
        Some(pb::filter_settings::Kind::Window(w)) => FilterSpec::Window {
            frames: w.frames,
            span_ms: w.span_ms,
        },
        Some(pb::filter_settings::Kind::Forward(f)) => FilterSpec::Forward {
            stay: f.stay.clone(),
            priors: f.priors.clone(),
            step_ms: if f.step_ms == 0.0 {
                DEFAULT_STEP_MS
            } else {
                f.step_ms
            },
        },
    };
    let decision = match &opening.decision {
        Some(d) => DecisionSpec {
            enter: d.enter,
            exit: d.exit,
            dwell_ms: d.dwell_ms,
        },
        None => DecisionSpec::default(),
    };
    let quality = match &opening.quality {
        Some(q) => QualitySpec {
            min_focus: q.min_focus,
            max_clipped: q.max_clipped,
        },
        None => QualitySpec::default(),
    };
    let policy = match pb::FramePolicy::try_from(opening.policy) {
        Ok(pb::FramePolicy::Unspecified | pb::FramePolicy::EveryFrame) => FramePolicy::EveryFrame,
        Ok(pb::FramePolicy::LatestOnly) => FramePolicy::LatestOnly,
        Err(_) => {
            return Err(opening_error(
                "policy",
                format!("is {}, not a known frame policy", opening.policy),
            ));
        }
    };
    if opening.source_label.len() > MAX_SOURCE_LABEL {
        return Err(opening_error(
            "source_label",
            format!(
                "is {} bytes; at most {MAX_SOURCE_LABEL}",
                opening.source_label.len()
            ),
        ));
    }
    let settings = StreamSettings {
        frame: FrameSpec {
            region,
            yuv: YuvSpec { matrix, range },
            limits,
        },
        filter,
        decision,
        quality,
    };
    settings
        .validate(model.classes().len())
        .map_err(|e| OpeningError {
            field: e.field.to_string(),
            problem: e.problem,
        })?;
    Ok(SessionPlan {
        settings,
        default_format,
        policy,
        deadline_us: u64::from(opening.deadline_ms) * 1000,
        source_label: opening.source_label.clone(),
    })
}

/// The settings in force, as the wire states them (echoed in the session's accepted message).
pub fn wire_settings(plan: &SessionPlan, model_name: &str) -> pb::SessionOpening {
    let s = &plan.settings;
    let filter = match &s.filter {
        FilterSpec::PassThrough => pb::filter_settings::Kind::PassThrough(pb::PassThrough {}),
        FilterSpec::Exponential { tau_ms } => {
            pb::filter_settings::Kind::Exponential(pb::Exponential { tau_ms: *tau_ms })
        }
        FilterSpec::Window { frames, span_ms } => pb::filter_settings::Kind::Window(pb::Window {
            frames: *frames,
            span_ms: *span_ms,
        }),
        FilterSpec::Forward {
            stay,
            priors,
            step_ms,
        } => pb::filter_settings::Kind::Forward(pb::Forward {
            stay: stay.clone(),
            priors: priors.clone(),
            step_ms: *step_ms,
        }),
    };
    pb::SessionOpening {
        // Where frames come from is not a setting of the analysis; the settings echo leaves it out.
        frame_file: String::new(),
        model: model_name.to_string(),
        default_format: plan
            .default_format
            .map_or(pb::PixelFormat::Unspecified, wire_format) as i32,
        yuv_matrix: match s.frame.yuv.matrix {
            YuvMatrix::Bt601 => pb::YuvMatrix::Bt601,
            YuvMatrix::Bt709 => pb::YuvMatrix::Bt709,
        } as i32,
        yuv_range: match s.frame.yuv.range {
            YuvRange::Limited => pb::YuvRange::Limited,
            YuvRange::Full => pb::YuvRange::Full,
        } as i32,
        region: s.frame.region.map(|r| pb::Region {
            x: r.x,
            y: r.y,
            width: r.width,
            height: r.height,
        }),
        filter: Some(pb::FilterSettings { kind: Some(filter) }),
        decision: Some(pb::DecisionSettings {
            enter: s.decision.enter,
            exit: s.decision.exit,
            dwell_ms: s.decision.dwell_ms,
        }),
        quality: Some(pb::QualitySettings {
            min_focus: s.quality.min_focus,
            max_clipped: s.quality.max_clipped,
        }),
        policy: match plan.policy {
            FramePolicy::EveryFrame => pb::FramePolicy::EveryFrame,
            FramePolicy::LatestOnly => pb::FramePolicy::LatestOnly,
        } as i32,
        deadline_ms: (plan.deadline_us / 1000) as u32,
        source_label: plan.source_label.clone(),
    }
}

/// The model's identity on the wire.
pub fn identity(model: &Model) -> pb::ModelIdentity {
    let id = model.identity();
    pb::ModelIdentity {
        name: id.name.clone(),
        version: id.version.clone(),
        sha256: id.sha256.clone(),
        engine: id.engine.to_string(),
        self_test: Some(self_test_report(&id.self_test)),
    }
}

/// A self-test outcome on the wire.
pub fn self_test_report(outcome: &SelfTestOutcome) -> pb::SelfTestReport {
    let (cases, failed, tolerance, made_by) = match outcome {
        SelfTestOutcome::Absent | SelfTestOutcome::NotRun => (0, 0, 0.0, ""),
        SelfTestOutcome::Passed {
            cases,
            tolerance,
            made_by,
            ..
        } => (*cases, 0, *tolerance, made_by.as_str()),
        SelfTestOutcome::Failed {
            cases,
            failed,
            tolerance,
            made_by,
            ..
        } => (*cases, *failed, *tolerance, made_by.as_str()),
    };
    pb::SelfTestReport {
        verdict: outcome.verdict().to_string(),
        cases: cases as u32,
        failed: failed as u32,
        largest_deviation: outcome.largest_deviation(),
        tolerance,
        made_by: made_by.to_string(),
        first_failure: match outcome {
            SelfTestOutcome::Failed { first, .. } => first.clone(),
            _ => String::new(),
        },
    }
}

/// The model's input recipe on the wire.
pub fn input_recipe(model: &Model) -> pb::InputRecipe {
    let m = model.manifest();
    let i = &m.input;
    pb::InputRecipe {
        tensor: i.tensor.clone(),
        layout: match i.layout {
            Layout::Nchw => "nchw",
            Layout::Nhwc => "nhwc",
        }
        .into(),
        width: i.width,
        height: i.height,
        colour_order: match i.colour_order {
            ColourOrder::Rgb => "rgb",
            ColourOrder::Bgr => "bgr",
        }
        .into(),
        resize: match i.resize {
            ResizeRule::Stretch => "stretch",
            ResizeRule::CentreCrop => "centre_crop",
            ResizeRule::Letterbox => "letterbox",
        }
        .into(),
        interpolation: i.interpolation.name().into(),
        scale: i.scale,
        mean: i.mean.to_vec(),
        std: i.std.to_vec(),
        output: match m.output.kind {
            OutputKind::Logits => "logits",
            OutputKind::Probabilities => "probabilities",
        }
        .into(),
    }
}

/// A model's full description.
pub fn model_card(model: &Model, is_default: bool) -> pb::ModelCard {
    let m = model.manifest();
    pb::ModelCard {
        identity: Some(identity(model)),
        classes: m.classes.clone(),
        input: Some(input_recipe(model)),
        intended_use: m.intended_use.clone(),
        model_caution: m.caution.clone(),
        caution: CAUTION.into(),
        is_default,
    }
}

/// A decision on the wire.
pub fn decision(d: Decision, classes: &[String]) -> pb::Decision {
    match d {
        Decision::Undetermined => pb::Decision::default(),
        Decision::Class { index, confidence } => pb::Decision {
            determined: true,
            class_index: index as u32,
            class_name: classes.get(index).cloned().unwrap_or_default(),
            confidence,
        },
    }
}

/// Quality on the wire.
pub fn quality(m: &QualityMeasures, v: &QualityVerdict) -> pb::Quality {
    pb::Quality {
        focus: m.focus,
        dark_share: m.dark_share,
        bright_share: m.bright_share,
        blurred: v.blurred,
        badly_exposed: v.badly_exposed,
        usable: v.usable,
    }
}

/// Timings on the wire.
pub fn timings(t: &StageTimings) -> pb::StageTimings {
    pb::StageTimings {
        queue_us: t.queue_us,
        preprocess_us: t.preprocess_us,
        inference_us: t.inference_us,
        filter_us: t.filter_us,
        total_us: t.total_us,
    }
}

/// Percentiles on the wire.
pub fn percentiles(p: &[Percentiles]) -> Vec<pb::StagePercentiles> {
    p.iter()
        .map(|p| pb::StagePercentiles {
            stage: p.stage.into(),
            count: p.count,
            p50_us: p.p50,
            p90_us: p.p90,
            p99_us: p.p99,
            p999_us: p.p999,
            max_us: p.max,
        })
        .collect()
}
