//! The framewise demo model package and the seeded generator of synthetic recordings.
//!
//! # Layout
//! - [`package`]: the demo model (`package/phantom-zones.onnx` and its manifest), embedded with `include_bytes!`.
//! - [`phantom`]: the invented scenario, a camera sweeping over a printed drum with textured zones.
//! - [`recording`]: writes recordings (PNG frames and `labels.csv`) as `framewise replay` reads them.
//! - [`rng`]: the seeded generator behind both.
//!
//! The demo model is a toy trained on these synthetic frames to exercise the pipeline. It is not a medical
//! model and must never be used on patients.

pub mod package;
pub mod phantom;
pub mod recording;
pub mod rng;
