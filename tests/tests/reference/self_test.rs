//! A package's self-test at load: the demo package's own cases (OpenCV and onnxruntime's probabilities,
//! written by `models-demo/scripts/make_self_test.py`) pass on both engines; a manifest whose recipe is not
//! the validation pipeline's, or cases that disagree with the model, make the model refused, or served marked
//! as failing when asked.

use framewise_engine::{EngineOptions, ModelError, ModelPackage, SelfTestOutcome, load_model};
use framewise_models_demo::package::write_demo_package;
use framewise_tests::{demo_package, onnxruntime_options};

fn temp_package(tag: &str) -> std::path::PathBuf {
    let dir =
        std::env::temp_dir().join(format!("framewise-self-test-{tag}-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&dir);
    write_demo_package(&dir).expect("the demo package is written");
    dir
}

#[test]
fn the_demo_package_passes_its_self_test_on_both_engines() {
    for options in [EngineOptions::default(), onnxruntime_options(1)] {
        let model = load_model(&demo_package(), None, &options).expect("the demo model loads");
        let outcome = &model.identity().self_test;
        eprintln!(
            "demo self-test on {}: {}",
            model.identity().engine,
            outcome.summary()
        );
        // Reference: the probabilities cv2.imread + cv2.resize(INTER_AREA) + onnxruntime gave for the cases.
        let SelfTestOutcome::Passed {
            cases,
            largest_deviation,
            tolerance,
            ..
        } = outcome
        else {
            panic!("the demo self-test did not pass: {}", outcome.summary())
        };
        assert_eq!(*cases, 6);
        eprintln!("largest deviation {largest_deviation:e} (tolerance {tolerance:e})");
    }
    // The same package read from disk runs the same cases.
    let dir = temp_package("read");
    let package = ModelPackage::read(&dir).expect("the written package reads");
    assert_eq!(package.self_test, demo_package().self_test);
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn a_recipe_that_is_not_the_validation_pipelines_is_refused_at_load() {
    // The demo model was validated with cv2.resize INTER_AREA; a manifest that says INTER_LINEAR gives other
    // numbers, and its own cases show it.
    let dir = temp_package("recipe");
    let manifest = std::fs::read_to_string(dir.join("manifest.toml")).expect("manifest");
    std::fs::write(
        dir.join("manifest.toml"),
        manifest.replace("opencv-area", "opencv-linear"),
    )
    .expect("write");
    let package = ModelPackage::read(&dir).expect("reads");
    let err = load_model(&package, None, &EngineOptions::default()).expect_err("refused");
    let text = err.to_string();
    assert!(matches!(err, ModelError::SelfTestFailed { .. }), "{text}");
    assert!(
        text.contains("phantom-zones") && text.contains("beyond the tolerance"),
        "{text}"
    );
    eprintln!("refusal: {text}");
    // Asked to, the server serves it, marked as failing in its identity.
    let options = EngineOptions {
        serve_failed_self_test: true,
        ..EngineOptions::default()
    };
    let model = load_model(&package, None, &options).expect("served when asked");
    let outcome = &model.identity().self_test;
    assert_eq!(outcome.verdict(), "failed");
    assert!(outcome.largest_deviation() > 1e-4, "{}", outcome.summary());
    let _ = std::fs::remove_dir_all(&dir);
}

#[test]
fn cases_that_disagree_or_cannot_be_read_are_named() {
    let dir = temp_package("cases");
    let cases = dir.join("self-test/cases.toml");
    let text = std::fs::read_to_string(&cases).expect("cases");
    // One expected probability moved by 0.01: beyond the tolerance of 1e-4.
    let tampered = text.replacen("probabilities = [0.0075", "probabilities = [0.0175", 1);
    assert_ne!(tampered, text, "the boundary case is in the file");
    std::fs::write(&cases, &tampered).expect("write");
    let package = ModelPackage::read(&dir).expect("reads");
    let err = load_model(&package, None, &EngineOptions::default()).expect_err("refused");
    assert!(err.to_string().contains("boundary-1.jpg"), "{err}");
    // A case image that is missing names the file.
    std::fs::write(&cases, text.replace("plain.png", "missing.png")).expect("write");
    let err = ModelPackage::read(&dir).expect_err("refused");
    let text = err.to_string();
    assert!(
        text.contains("cases.toml") && text.contains("missing.png"),
        "{text}"
    );
    let _ = std::fs::remove_dir_all(&dir);
}
