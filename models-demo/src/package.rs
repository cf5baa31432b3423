//! The embedded demo model package: the ONNX file and its manifest, compiled into every binary.

/// Name of the embedded demo model.
pub const DEMO_MODEL_NAME: &str = "phantom-zones";

/// The demo model's manifest (TOML).
pub const DEMO_MANIFEST: &str = include_str!("../package/manifest.toml");

/// The demo model's ONNX file.
pub const DEMO_ONNX: &[u8] = include_bytes!("../package/phantom-zones.onnx");
