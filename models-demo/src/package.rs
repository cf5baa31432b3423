//! The embedded demo model package: the ONNX file, its manifest and its self-test cases (images and the
//! probabilities OpenCV and onnxruntime gave for them, written by `scripts/make_self_test.py`), compiled
//! into every binary.

use framewise_engine::{ModelError, ModelPackage};

/// Name of the embedded demo model.
pub const DEMO_MODEL_NAME: &str = "phantom-zones";

/// The demo model's manifest (TOML).
pub const DEMO_MANIFEST: &str = include_str!("../package/manifest.toml");

/// The demo model's ONNX file.
pub const DEMO_ONNX: &[u8] = include_bytes!("../package/phantom-zones.onnx");

/// The demo model's self-test cases file, as the manifest's `self_test` names it.
pub const DEMO_SELF_TEST: (&str, &str) = (
    "self-test/cases.toml",
    include_str!("../package/self-test/cases.toml"),
);

/// The images the self-test cases name, relative to the cases file.
pub const DEMO_SELF_TEST_FILES: &[(&str, &[u8])] = &[
    (
        "plain.png",
        include_bytes!("../package/self-test/plain.png"),
    ),
    (
        "dotted.jpg",
        include_bytes!("../package/self-test/dotted.jpg"),
    ),
    (
        "striped.jpg",
        include_bytes!("../package/self-test/striped.jpg"),
    ),
    ("grid.jpg", include_bytes!("../package/self-test/grid.jpg")),
    (
        "boundary-1.jpg",
        include_bytes!("../package/self-test/boundary-1.jpg"),
    ),
    (
        "boundary-2.jpg",
        include_bytes!("../package/self-test/boundary-2.jpg"),
    ),
];

/// The embedded demo package, with its self-test.
pub fn demo_package() -> Result<ModelPackage, ModelError> {
    let (name, text) = DEMO_SELF_TEST;
    ModelPackage::from_parts(DEMO_MANIFEST, DEMO_ONNX)?.with_self_test(
        &format!("{name} (embedded)"),
        text,
        |image| {
            DEMO_SELF_TEST_FILES
                .iter()
                .find(|(n, _)| *n == image)
                .map(|(_, bytes)| bytes.to_vec())
                .ok_or_else(|| format!("{image} is not embedded"))
        },
    )
}

/// Writes the demo package (manifest, ONNX file, self-test cases and images) into `dir`, as a package on
/// disk looks.
pub fn write_demo_package(dir: &std::path::Path) -> std::io::Result<()> {
    std::fs::create_dir_all(dir.join("self-test"))?;
    std::fs::write(dir.join("manifest.toml"), DEMO_MANIFEST)?;
    std::fs::write(dir.join("phantom-zones.onnx"), DEMO_ONNX)?;
    std::fs::write(dir.join(DEMO_SELF_TEST.0), DEMO_SELF_TEST.1)?;
    for (name, bytes) in DEMO_SELF_TEST_FILES {
        std::fs::write(dir.join("self-test").join(name), bytes)?;
    }
    Ok(())
}
