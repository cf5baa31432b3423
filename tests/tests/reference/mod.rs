//! The engine against the reference tools, on the same inputs: inference against onnxruntime, the filters
//! and measures against SciPy and OpenCV here; the exact preprocessing in the modules below.

mod colour;
mod files;
mod parity;
mod recipes;
mod self_test;

use std::sync::Arc;

use framewise_engine::filter::FilterSpec;
use framewise_engine::pipeline::{self, Scratch};
use framewise_engine::preprocess::luma_of;
use framewise_engine::quality::laplacian_variance;
use framewise_engine::{EngineKind, EngineOptions, FrameRef, Model, ModelPackage, PixelFormat};
use framewise_tests::{
    byte_diff, demo_model, demo_model_onnxruntime, fixtures, index, max_abs_diff,
    onnxruntime_options, read_bytes, read_f32,
};
use serde_json::Value;

fn floats(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn check_inference(model: &Model, cases: &Value, tolerance: f64) -> f64 {
    let mut worst = 0.0f64;
    let cases = cases["cases"].as_array().expect("cases");
    assert!(cases.len() >= 20, "at least 20 inputs, got {}", cases.len());
    for (i, case) in cases.iter().enumerate() {
        let input = read_f32(case["input"].as_str().expect("input"));
        let got = model.infer(&input).expect("inference runs");
        let diff = max_abs_diff(&got, &floats(&case["probs"]));
        // Reference: onnxruntime 1.32 (CPUExecutionProvider) on the same tensor, softmax in float64.
        assert!(
            diff <= tolerance,
            "case {i}: max |ours - onnxruntime| = {diff:e} > {tolerance:e}"
        );
        worst = worst.max(diff);
    }
    worst
}

#[test]
fn demo_model_equals_onnxruntime() {
    let worst = check_inference(&demo_model(), &index()["inference"]["demo"], 1e-5);
    eprintln!("demo model: max |tract - onnxruntime| = {worst:e}");
}

#[test]
fn demo_model_on_the_onnxruntime_engine_equals_python_onnxruntime() {
    let model = demo_model_onnxruntime();
    assert_eq!(model.identity().engine, "onnxruntime");
    // Reference: Python onnxruntime on the same tensors (the same library, called through its C API here).
    let worst = check_inference(&model, &index()["inference"]["demo"], 1e-6);
    eprintln!("demo model: max |framewise onnxruntime engine - Python onnxruntime| = {worst:e}");
}

#[test]
fn bench_model_equals_onnxruntime_on_every_engine_and_thread_count() {
    let package = ModelPackage::read(&fixtures().join("bench-model")).expect("bench package reads");
    let model = Model::load(&package, None).expect("bench model loads");
    assert!(
        model.can_batch(),
        "the bench model has a symbolic batch dimension"
    );
    let cases = &index()["inference"]["bench"];
    let worst = check_inference(&model, cases, 1e-4);
    eprintln!("bench model: max |tract - onnxruntime| = {worst:e}");
    let two = Model::load_with(
        &package,
        None,
        &EngineOptions {
            threads: 2,
            ..EngineOptions::default()
        },
    )
    .expect("bench model loads on tract with 2 threads");
    let worst = check_inference(&two, cases, 1e-4);
    eprintln!("bench model: max |tract (2 threads) - onnxruntime| = {worst:e}");
    for threads in [1, 2] {
        let model = Model::load_with(&package, None, &onnxruntime_options(threads))
            .expect("bench model loads on ONNX Runtime");
        assert_eq!(model.identity().engine, "onnxruntime");
        let worst = check_inference(&model, cases, 1e-5);
        eprintln!(
            "bench model: max |onnxruntime engine ({threads} threads) - Python onnxruntime| = {worst:e}"
        );
    }
}

#[test]
fn auto_engine_takes_onnxruntime_when_it_loads_and_tract_otherwise() {
    let package = framewise_tests::demo_package();
    let mut options = onnxruntime_options(1);
    options.kind = EngineKind::Auto;
    let model = Model::load_with(&package, None, &options).expect("auto loads");
    assert_eq!(model.identity().engine, "onnxruntime");
    options.onnxruntime_library = Some("/nonexistent/libonnxruntime.so".into());
    let model = Model::load_with(&package, None, &options).expect("auto falls back");
    assert_eq!(model.identity().engine, "tract");
    options.kind = EngineKind::OnnxRuntime;
    let err = Model::load_with(&package, None, &options).expect_err("a missing library is refused");
    let text = err.to_string();
    assert!(
        text.contains("/nonexistent/libonnxruntime.so") && text.contains("onnxruntime"),
        "{text}"
    );
}

#[test]
fn batches_equal_single_frames() {
    let model = demo_model();
    let cases = index()["inference"]["demo"]["cases"]
        .as_array()
        .expect("cases")
        .clone();
    let inputs: Vec<Vec<f32>> = cases
        .iter()
        .take(5)
        .map(|c| read_f32(c["input"].as_str().expect("input")))
        .collect();
    let refs: Vec<&[f32]> = inputs.iter().map(Vec::as_slice).collect();
    let batch = model.infer_batch(&refs).expect("batch runs");
    for (i, input) in inputs.iter().enumerate() {
        let single = model.infer(input).expect("single runs");
        let diff = single
            .iter()
            .zip(&batch[i])
            .map(|(a, b)| (a - b).abs())
            .fold(0.0f32, f32::max);
        // Reference: the same model on one frame; batching must not change the numbers beyond float rounding.
        assert!(
            diff <= 1e-6,
            "frame {i}: batch differs from single by {diff:e}"
        );
    }
}

#[test]
fn focus_measure_matches_opencv_laplacian_variance() {
    for case in index()["focus"].as_array().expect("cases") {
        let (w, h) = (
            case["width"].as_u64().expect("w") as usize,
            case["height"].as_u64().expect("h") as usize,
        );
        let luma = read_bytes(case["luma"].as_str().expect("luma"));
        let ours = laplacian_variance(&luma, w, h);
        let theirs = case["variance"].as_f64().expect("variance");
        // Reference: cv2.Laplacian(img, cv2.CV_64F, ksize=1).var() (Pech-Pacheco et al., 2000).
        assert!(
            (ours - theirs).abs() <= 1e-9 * theirs.max(1.0),
            "{w}x{h}: ours {ours}, OpenCV {theirs}"
        );
    }
    let luma = &index()["luma"];
    let mut ours = Vec::new();
    luma_of(&read_bytes(luma["rgb"].as_str().expect("rgb")), &mut ours);
    // Reference: cv2.cvtColor(COLOR_RGB2GRAY).
    let (max, count) = byte_diff(&ours, &read_bytes(luma["gray"].as_str().expect("gray")));
    assert_eq!(
        (max, count),
        (0, 0),
        "luma differs from OpenCV in {count} pixels, by up to {max}"
    );
}

#[test]
fn exponential_filter_matches_scipy_lfilter() {
    for case in index()["exponential"].as_array().expect("cases") {
        let tau_ms = case["tau_ms"].as_f64().expect("tau");
        let dt = case["dt_ms"].as_f64().expect("dt");
        let mut filter = FilterSpec::Exponential { tau_ms }.build(3).expect("valid");
        for (n, (x, want)) in case["input"]
            .as_array()
            .expect("in")
            .iter()
            .zip(case["expected"].as_array().expect("out"))
            .enumerate()
        {
            let x: Vec<f32> = floats(x).iter().map(|&v| v as f32).collect();
            let got = filter.update(n as f64 * dt, &x).to_vec();
            // Reference: scipy.signal.lfilter([alpha], [1, alpha - 1]) with alpha = 1 - exp(-dt/tau).
            let diff = max_abs_diff(&got, &floats(want));
            assert!(
                diff <= 1e-6,
                "tau {tau_ms} dt {dt} step {n}: differs from lfilter by {diff:e}"
            );
        }
    }
}

#[test]
fn streamed_analyser_equals_the_functions_it_is_made_of() {
    // Property: the offline analyser (used by replay --offline) gives what prepare + infer + smooth give.
    let model: Arc<Model> = demo_model();
    let case = &index()["exact"]["decode"][0];
    let data = read_bytes(case["file"].as_str().expect("file"));
    let frame = FrameRef {
        format: PixelFormat::Jpeg,
        width: 0,
        height: 0,
        stride: 0,
        data: &data,
    };
    let settings = framewise_engine::StreamSettings::default();
    let mut analyser =
        framewise_engine::Analyser::new(model.clone(), &settings).expect("valid settings");
    let outcome = analyser.analyse(&frame, 0.0).expect("analyses");
    let mut scratch = Scratch::default();
    let analysed =
        pipeline::analyse(&model, &frame, &settings.frame, &mut scratch).expect("analyses");
    assert_eq!(outcome.analysed.raw, analysed.raw);
}
