//! The engine against the reference tools, on the same inputs.

use std::sync::Arc;

use framewise_engine::filter::FilterSpec;
use framewise_engine::frame::{self, DecodeScratch, RgbImage};
use framewise_engine::manifest::{InputSpec, Interpolation, ResizeRule};
use framewise_engine::pipeline::{self, FrameSpec, Scratch};
use framewise_engine::preprocess::{Preprocessor, luma_of};
use framewise_engine::quality::laplacian_variance;
use framewise_engine::{
    EngineKind, EngineOptions, FrameRef, Model, ModelPackage, PixelFormat, Region, YuvMatrix,
    YuvRange, YuvSpec,
};
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

fn format_of(name: &str) -> PixelFormat {
    PixelFormat::from_name(name).expect("known format")
}

/// The raw frame a fixture case describes.
fn frame_of<'a>(case: &Value, data: &'a [u8]) -> FrameRef<'a> {
    FrameRef {
        format: format_of(case["format"].as_str().expect("format")),
        width: case["width"].as_u64().expect("w") as u32,
        height: case["height"].as_u64().expect("h") as u32,
        stride: case["stride"].as_u64().expect("stride") as u32,
        data,
    }
}

fn region_of(v: &Value) -> Option<Region> {
    if v.is_null() {
        return None;
    }
    let n = |k: &str| v[k].as_u64().expect("region field") as u32;
    Some(Region {
        x: n("x"),
        y: n("y"),
        width: n("width"),
        height: n("height"),
    })
}

#[test]
fn colour_conversion_matches_opencv_and_the_standards() {
    let mut report = Vec::new();
    for case in index()["whole_path"].as_array().expect("cases") {
        let format = format_of(case["format"].as_str().expect("format"));
        let data = read_bytes(case["frame"].as_str().expect("frame"));
        let frame = frame_of(case, &data);
        let region = region_of(&case["region"]);
        let convert = |spec: YuvSpec| {
            let mut out = RgbImage::default();
            frame::to_rgb(
                &frame,
                region,
                spec,
                &Default::default(),
                &mut DecodeScratch::default(),
                &mut out,
            )
            .expect("frame converts");
            out
        };
        let ours = convert(YuvSpec::default());
        let expected = read_bytes(case["expected_rgb"].as_str().expect("rgb"));
        let (max, count) = byte_diff(&ours.data, &expected);
        let limit = match format {
            // Reference: cv2.cvtColor / cv2.imdecode. Raw RGB-family layouts and PNG are lossless: exact.
            PixelFormat::Rgb8
            | PixelFormat::Bgr8
            | PixelFormat::Rgba8
            | PixelFormat::Bgra8
            | PixelFormat::Gray8
            | PixelFormat::Png => 0,
            // Reference: cv2.cvtColor COLOR_YUV2RGB_NV12/I420/YUYV (BT.601 limited range, fixed point). Our
            // converter rounds differently: measured here at most 2 grey levels.
            PixelFormat::Nv12 | PixelFormat::I420 | PixelFormat::Yuyv => 2,
            // Reference: cv2.imdecode (libjpeg-turbo); JPEG decoders may differ in IDCT and chroma upsampling.
            // Measured here: see the report line.
            PixelFormat::Jpeg => 40,
        };
        report.push(format!(
            "{format} region={:?}: max {max}, {count} bytes differ",
            region.map(|r| r.to_string())
        ));
        assert!(
            max <= limit,
            "{format} {region:?}: max difference {max} > {limit} against OpenCV"
        );
        if let Some(standards) = case.get("standard_rgb").and_then(Value::as_object) {
            for (key, file) in standards {
                let (matrix, range) = match key.as_str() {
                    "bt601_limited" => (YuvMatrix::Bt601, YuvRange::Limited),
                    "bt601_full" => (YuvMatrix::Bt601, YuvRange::Full),
                    "bt709_limited" => (YuvMatrix::Bt709, YuvRange::Limited),
                    _ => (YuvMatrix::Bt709, YuvRange::Full),
                };
                let ours = convert(YuvSpec { matrix, range });
                let expected = read_bytes(file.as_str().expect("file"));
                let (max, _) = byte_diff(&ours.data, &expected);
                // Reference: the ITU-R BT.601 / BT.709 equations in float (NumPy), rounded once.
                report.push(format!(
                    "{format} {key}: max {max} against the ITU-R equations"
                ));
                assert!(
                    max <= 2,
                    "{format} {key}: max difference {max} > 2 against the ITU-R equations"
                );
            }
        }
    }
    eprintln!("{}", report.join("\n"));
}

#[test]
fn whole_path_matches_the_opencv_onnxruntime_reference() {
    let mut scratch = Scratch::default();
    let mut report = Vec::new();
    let cases = index()["whole_path"].as_array().expect("cases").clone();
    let engines = [demo_model(), demo_model_onnxruntime()];
    for (model, case) in engines
        .iter()
        .flat_map(|m| cases.iter().map(move |c| (m, c)))
    {
        let format = format_of(case["format"].as_str().expect("format"));
        let data = read_bytes(case["frame"].as_str().expect("frame"));
        let frame = frame_of(case, &data);
        let spec = FrameSpec {
            region: region_of(&case["region"]),
            ..Default::default()
        };
        let analysed =
            pipeline::analyse(model, &frame, &spec, &mut scratch).expect("frame analyses");
        let diff = max_abs_diff(&analysed.raw, &floats(&case["probs"]));
        // Reference: cv2.cvtColor + centre crop + cv2.resize(INTER_AREA) + normalise, then onnxruntime.
        // Inputs differ by the colour converter's rounding (<= 2 levels) and the area filter (<= 1 level
        // at these whole-number factors; JPEG by its decoder): the probabilities within 0.02.
        report.push(format!(
            "{} {format} region={}: max |dp| = {diff:.2e}",
            model.identity().engine,
            !case["region"].is_null()
        ));
        assert!(
            diff <= 0.02,
            "{format}: probabilities differ from the reference path by {diff}"
        );
    }
    eprintln!("{}", report.join("\n"));
}

fn spec_for(w: u32, h: u32, interpolation: Interpolation) -> InputSpec {
    InputSpec {
        tensor: "x".into(),
        layout: framewise_engine::manifest::Layout::Nchw,
        width: w,
        height: h,
        colour_order: framewise_engine::manifest::ColourOrder::Rgb,
        scale: 1.0,
        mean: [0.0; 3],
        std: [1.0; 3],
        resize: ResizeRule::Stretch,
        interpolation,
        letterbox_fill: 0,
    }
}

#[test]
fn resizing_matches_opencv() {
    let mut pre = Preprocessor::new();
    let mut tensor = Vec::new();
    let mut report = Vec::new();
    for case in index()["resize"].as_array().expect("cases") {
        let (w, h) = (
            case["width"].as_u64().expect("w") as u32,
            case["height"].as_u64().expect("h") as u32,
        );
        let target = floats(&case["target"]);
        let (tw, th) = (target[0] as u32, target[1] as u32);
        let rgb = RgbImage {
            width: w,
            height: h,
            data: read_bytes(case["source"].as_str().expect("src")),
        };
        for (name, interpolation) in [
            ("bilinear", Interpolation::Bilinear),
            ("area", Interpolation::Area),
        ] {
            let prepared = pre.prepare(&spec_for(tw, th, interpolation), &rgb, &mut tensor);
            let expected = read_bytes(case[name].as_str().expect("file"));
            let (max, count) = byte_diff(prepared.picture, &expected);
            let mean = prepared
                .picture
                .iter()
                .zip(&expected)
                .map(|(a, b)| f64::from(a.abs_diff(*b)))
                .sum::<f64>()
                / expected.len() as f64;
            let whole = w % tw == 0 && h % th == 0;
            let down = tw <= w && th <= h;
            // Reference: cv2.resize with INTER_LINEAR / INTER_AREA.
            let limit = match (name, whole, down) {
                // fast_image_resize's interpolating bilinear follows INTER_LINEAR within 1 level.
                ("bilinear", _, _) => 1,
                // Shrinking: the same area weights as OpenCV's INTER_AREA, summed in another order.
                ("area", _, true) => 1,
                // Enlarging: OpenCV's INTER_AREA becomes bilinear-like, ours a box filter. Only reported:
                // measured up to 54 levels (97x61 to 224x224); a classifier's input is rarely enlarged.
                _ => 255,
            };
            report.push(format!(
                "{w}x{h} -> {tw}x{th} {name}: max {max}, mean {mean:.3}, {count} of {} bytes differ",
                expected.len()
            ));
            if name != "area" || down {
                assert!(
                    mean < 0.5,
                    "{w}x{h} -> {tw}x{th} {name}: mean difference {mean}"
                );
            }
            assert!(
                max <= limit,
                "{w}x{h} -> {tw}x{th} {name}: max {max} > {limit}"
            );
        }
    }
    eprintln!("{}", report.join("\n"));
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
    let case = &index()["whole_path"][0];
    let data = read_bytes(case["frame"].as_str().expect("frame"));
    let frame = FrameRef {
        format: format_of(case["format"].as_str().expect("format")),
        width: case["width"].as_u64().expect("w") as u32,
        height: case["height"].as_u64().expect("h") as u32,
        stride: case["stride"].as_u64().expect("stride") as u32,
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
