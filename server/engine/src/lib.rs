//! The framewise engine: everything that turns one frame into class probabilities and a steady decision,
//! with no network code. The server, the command-line client's offline paths and its in-process demo all
//! use it.
//!
//! # Layout
//! - [`frame`]: pixel formats, validation, decoding (PNG, JPEG as libjpeg-turbo) and colour conversion (YUV
//!   as OpenCV and the ITU-R equations) over a region of interest.
//! - [`manifest`] and [`model`]: model packages, their checks against the graph, CPU inference.
//! - [`cases`] and [`selftest`]: a package's reference cases, run at load ([`selftest::load`]) on the host that
//!   serves, and the outcome every model identity carries.
//! - [`engine`]: which inference engine runs a model (tract or ONNX Runtime) and with how many threads.
//! - [`resize`]: resize recipes, each the arithmetic of one library (OpenCV, Pillow) value for value.
//! - [`preprocess`]: the manifest's recipe from RGB to the model's input tensor.
//! - [`quality`]: focus and exposure measures.
//! - [`filter`]: temporal filters and the decision with hysteresis.
//! - [`pipeline`]: one frame's path through all of the above, shared by every caller.
//! - [`latency`]: per-stage HdrHistograms.
//! - [`scoring`]: metrics of outputs against labels (accuracy, sensitivity, ROC AUC, calibration, timing).
//! - [`caution`]: the caution that travels with every output.

pub mod cases;
pub mod caution;
pub mod engine;
pub mod filter;
pub mod fold;
pub mod frame;
pub mod latency;
pub mod manifest;
pub mod model;
pub mod pipeline;
pub mod preprocess;
pub mod quality;
pub mod resize;
pub mod scoring;
pub mod selftest;
mod vector;

pub use cases::SelfTestOutcome;
pub use caution::CAUTION;
pub use engine::{EngineKind, EngineOptions};
pub use filter::{Decision, DecisionSpec, FilterSpec, SettingsError};
pub use frame::{
    FrameError, FrameLimits, FrameRef, Needed, PixelFormat, Region, YuvMatrix, YuvRange, YuvSpec,
};
pub use manifest::Manifest;
pub use model::{Model, ModelError, ModelIdentity, ModelPackage, NodeTime};
pub use pipeline::{Analyser, FrameSpec, Outcome, StreamSettings};
pub use quality::QualitySpec;
pub use selftest::load as load_model;

/// The message a panic carried, for turning a panic inside a library into a clear refusal.
pub fn panic_text(payload: &(dyn std::any::Any + Send)) -> String {
    payload
        .downcast_ref::<&str>()
        .map(|s| s.to_string())
        .or_else(|| payload.downcast_ref::<String>().cloned())
        .unwrap_or_else(|| "without a message".into())
}
