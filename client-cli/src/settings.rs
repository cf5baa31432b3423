//! Session settings from the command line, turned into the wire's session opening (which the offline engine
//! reads through the same conversion as the server, so both run the same settings).

use anyhow::{Context, Result, bail};
use clap::Args;
use framewise_proto::v1 as pb;

/// The inference engine for the offline engine and the demo's in-process server.
#[derive(Debug, Clone, Args)]
pub struct EngineFlags {
    /// Inference engine: tract (built in), onnxruntime (needs libonnxruntime.so) or auto (onnxruntime when its
    /// library loads, tract otherwise).
    #[arg(long, default_value = "tract")]
    pub engine: framewise_engine::EngineKind,
    /// ONNX Runtime's shared library, libonnxruntime.so (default: $ORT_DYLIB_PATH, then the system's search
    /// path).
    #[arg(long)]
    pub onnxruntime_library: Option<std::path::PathBuf>,
    /// Threads per inference.
    #[arg(long, default_value_t = 1)]
    pub inference_threads: usize,
    /// Run a model that fails its package's self-test (marked as failing in the output) instead of refusing
    /// it.
    #[arg(long)]
    pub serve_failed_self_test: bool,
}

impl EngineFlags {
    /// The engine options these flags ask for.
    pub fn options(&self) -> framewise_engine::EngineOptions {
        framewise_engine::EngineOptions {
            kind: self.engine,
            onnxruntime_library: self.onnxruntime_library.clone(),
            threads: self.inference_threads.max(1),
            serve_failed_self_test: self.serve_failed_self_test,
        }
    }
}

/// Session settings shared by replay, demo and bench.
#[derive(Debug, Clone, Args)]
pub struct SessionFlags {
    /// Model name on the server (default: the server's default model).
    #[arg(long, default_value = "")]
    pub model_name: String,
    /// Temporal filter: none | exp:TAU_MS | window:FRAMES | window-ms:SPAN_MS | forward:STAY[:STEP_MS].
    #[arg(long, default_value = "exp:300")]
    pub filter: String,
    /// Smoothed probability needed to call a class.
    #[arg(long, default_value_t = 0.6)]
    pub enter: f64,
    /// A called class is released below this.
    #[arg(long, default_value_t = 0.4)]
    pub exit: f64,
    /// Milliseconds above `enter` before a class is called.
    #[arg(long, default_value_t = 500.0)]
    pub dwell_ms: f64,
    /// Frames with a lower focus (variance of the Laplacian) are unusable; 0 turns the check off.
    #[arg(long, default_value_t = 0.0)]
    pub min_focus: f64,
    /// Frames with a larger share of clipped pixels are unusable; 1 turns the check off.
    #[arg(long, default_value_t = 1.0)]
    pub max_clipped: f64,
    /// Region of interest X,Y,WIDTH,HEIGHT in pixels.
    #[arg(long)]
    pub roi: Option<String>,
    /// Frame policy: every | latest.
    #[arg(long, default_value = "every")]
    pub policy: String,
    /// Per-frame deadline in milliseconds (0: none).
    #[arg(long, default_value_t = 0)]
    pub deadline_ms: u32,
    /// YUV reading: bt601-limited | bt601-full | bt709-limited | bt709-full. Without it, BT.601 in the
    /// range the recording states (a Y4M file's XCOLORRANGE), else limited.
    #[arg(long)]
    pub yuv: Option<String>,
    /// Label of the source, for the server's logs.
    #[arg(long, default_value = "")]
    pub source_label: String,
}

/// Parses a filter description.
pub fn filter_settings(text: &str) -> Result<pb::FilterSettings> {
    use pb::filter_settings::Kind;
    let mut parts = text.split(':');
    let kind = parts.next().unwrap_or_default();
    let num = |v: Option<&str>, what: &str| -> Result<f64> {
        v.with_context(|| format!("--filter {text}: {what} is missing"))?
            .parse::<f64>()
            .with_context(|| format!("--filter {text}: {what} is not a number"))
    };
    let kind = match kind {
        "none" | "pass" => Kind::PassThrough(pb::PassThrough {}),
        "exp" => Kind::Exponential(pb::Exponential {
            tau_ms: num(parts.next(), "the time constant")?,
        }),
        "window" => Kind::Window(pb::Window {
            frames: num(parts.next(), "the frame count")? as u32,
            span_ms: 0.0,
        }),
        "window-ms" => Kind::Window(pb::Window {
            frames: 0,
            span_ms: num(parts.next(), "the span")?,
        }),
        "forward" => {
            let stay = num(parts.next(), "the stay probability")?;
            let step_ms = match parts.next() {
                Some(v) => num(Some(v), "the step")?,
                None => 0.0,
            };
            Kind::Forward(pb::Forward {
                stay: vec![stay],
                priors: vec![],
                step_ms,
            })
        }
        other => bail!(
            "--filter {other}: expected none, exp:TAU_MS, window:FRAMES, window-ms:SPAN_MS or forward:STAY[:STEP_MS]"
        ),
    };
    Ok(pb::FilterSettings { kind: Some(kind) })
}

impl SessionFlags {
    /// The session opening these flags describe.
    pub fn opening(&self) -> Result<pb::SessionOpening> {
        self.opening_for(None)
    }

    /// The session opening these flags describe, for a source that states its YUV code range (`--yuv`
    /// overrides it).
    pub fn opening_for(
        &self,
        stated: Option<framewise_engine::YuvRange>,
    ) -> Result<pb::SessionOpening> {
        let region = match &self.roi {
            Some(text) => {
                let v: Vec<u32> = text
                    .split(',')
                    .map(|p| p.trim().parse::<u32>())
                    .collect::<Result<_, _>>()
                    .with_context(|| {
                        format!("--roi {text}: expected X,Y,WIDTH,HEIGHT in whole pixels")
                    })?;
                if v.len() != 4 {
                    bail!("--roi {text}: expected X,Y,WIDTH,HEIGHT");
                }
                Some(pb::Region {
                    x: v[0],
                    y: v[1],
                    width: v[2],
                    height: v[3],
                })
            }
            None => None,
        };
        let policy = match self.policy.as_str() {
            "every" => pb::FramePolicy::EveryFrame,
            "latest" => pb::FramePolicy::LatestOnly,
            other => bail!("--policy {other}: expected every or latest"),
        };
        let yuv = match (&self.yuv, stated) {
            (Some(yuv), _) => yuv.as_str(),
            (None, Some(framewise_engine::YuvRange::Full)) => "bt601-full",
            (None, _) => "bt601-limited",
        };
        let (matrix, range) = match yuv {
            "bt601-limited" => (pb::YuvMatrix::Bt601, pb::YuvRange::Limited),
            "bt601-full" => (pb::YuvMatrix::Bt601, pb::YuvRange::Full),
            "bt709-limited" => (pb::YuvMatrix::Bt709, pb::YuvRange::Limited),
            "bt709-full" => (pb::YuvMatrix::Bt709, pb::YuvRange::Full),
            other => bail!(
                "--yuv {other}: expected bt601-limited, bt601-full, bt709-limited or bt709-full"
            ),
        };
        Ok(pb::SessionOpening {
            frame_file: String::new(),
            model: self.model_name.clone(),
            default_format: pb::PixelFormat::Unspecified as i32,
            yuv_matrix: matrix as i32,
            yuv_range: range as i32,
            region,
            filter: Some(filter_settings(&self.filter)?),
            decision: Some(pb::DecisionSettings {
                enter: self.enter,
                exit: self.exit,
                dwell_ms: self.dwell_ms,
            }),
            quality: Some(pb::QualitySettings {
                min_focus: self.min_focus,
                max_clipped: self.max_clipped,
            }),
            policy: policy as i32,
            deadline_ms: self.deadline_ms,
            source_label: self.source_label.clone(),
        })
    }
}
