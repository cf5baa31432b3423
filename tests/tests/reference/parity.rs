//! The whole path against the reference pipeline (OpenCV or Pillow to decode, convert and resize as the
//! manifest's recipe names; onnxruntime; a float64 softmax), for both engines and both layouts (an NHWC
//! non-square model and an exporter-style NCHW one), every recipe, every raw format and PNG/JPEG, regions of
//! interest and odd sizes, on natural pictures and models that are not saturated on them: probabilities
//! within 1e-5 on ONNX Runtime and 1e-4 on tract, arg-max identical. Then a Y4M recording replayed offline,
//! and the input shapes real exporters write. Fixtures: `tests/reference/exact.py`.

use std::collections::HashMap;
use std::sync::Arc;

use framewise_engine::manifest::ResizeRule;
use framewise_engine::pipeline::{self, FrameSpec, Scratch};
use framewise_engine::resize::Recipe;
use framewise_engine::{EngineOptions, FrameRef, Model, ModelPackage, PixelFormat, Region};
use framewise_tests::{Diff, binary, fixtures, index, onnxruntime_options, read_bytes, read_f32};
use serde_json::Value;

use super::floats;

/// Largest |ours - reference| per engine: ONNX Runtime is the reference's own library (float rounding of
/// the same kernels, measured 2e-7); tract computes the same graph with other kernels (measured 2e-6).
const ONNXRUNTIME_BOUND: f64 = 1e-5;
const TRACT_BOUND: f64 = 1e-4;

fn engines() -> [(&'static str, EngineOptions, f64); 2] {
    [
        ("tract", EngineOptions::default(), TRACT_BOUND),
        ("onnxruntime", onnxruntime_options(1), ONNXRUNTIME_BOUND),
    ]
}

fn argmax(v: impl IntoIterator<Item = f64>) -> usize {
    v.into_iter()
        .enumerate()
        .fold((0, f64::NEG_INFINITY), |best, (i, x)| {
            if x > best.1 { (i, x) } else { best }
        })
        .0
}

/// The parity package `name` with the case's recipe, rule and fill, on an engine; loaded once each.
fn model_for(
    cache: &mut HashMap<String, Arc<Model>>,
    name: &str,
    spec: &Value,
    engine: &str,
    options: &EngineOptions,
) -> Arc<Model> {
    let recipe = spec["interpolation"].as_str().expect("recipe");
    let rule = spec["resize"].as_str().expect("rule");
    let key = format!("{name} {recipe} {rule} {engine}");
    cache
        .entry(key)
        .or_insert_with(|| {
            let mut package =
                ModelPackage::read(&fixtures().join(name)).expect("parity package reads");
            let input = &mut package.manifest.input;
            input.interpolation = Recipe::from_name(recipe).expect("recipe");
            input.resize = match rule {
                "stretch" => ResizeRule::Stretch,
                "centre_crop" => ResizeRule::CentreCrop,
                _ => ResizeRule::Letterbox,
            };
            input.letterbox_fill = spec["letterbox_fill"].as_u64().expect("fill") as u8;
            Arc::new(Model::load_with(&package, None, options).expect("parity model loads"))
        })
        .clone()
}

#[test]
fn whole_path_equals_the_reference_pipeline_on_both_engines() {
    let cases = index()["exact"]["parity"]
        .as_array()
        .expect("parity")
        .clone();
    assert!(cases.len() >= 150, "{} cases", cases.len());
    let mut cache = HashMap::new();
    let mut scratch = Scratch::default();
    let mut failures = Vec::new();
    let mut formats_seen = std::collections::BTreeSet::new();
    for (engine, options, bound) in engines() {
        let mut total = Diff::default();
        for case in &cases {
            let spec = &case["spec"];
            let model = model_for(
                &mut cache,
                case["model"].as_str().expect("model"),
                spec,
                engine,
                &options,
            );
            let format =
                PixelFormat::from_name(case["format"].as_str().expect("format")).expect("known");
            formats_seen.insert(format.name());
            let data = read_bytes(case["frame"].as_str().expect("frame"));
            let raw = !format.is_encoded();
            let frame = FrameRef {
                format,
                width: if raw {
                    case["width"].as_u64().expect("w") as u32
                } else {
                    0
                },
                height: if raw {
                    case["height"].as_u64().expect("h") as u32
                } else {
                    0
                },
                stride: 0,
                data: &data,
            };
            let region = (!case["region"].is_null()).then(|| {
                let n = |k: &str| case["region"][k].as_u64().expect("region") as u32;
                Region {
                    x: n("x"),
                    y: n("y"),
                    width: n("width"),
                    height: n("height"),
                }
            });
            let frame_spec = FrameSpec {
                region,
                ..Default::default()
            };
            let analysed = pipeline::analyse(&model, &frame, &frame_spec, &mut scratch)
                .expect("frame analyses");
            let reference = floats(&case["probs"]);
            let diff = Diff::of(
                analysed.raw.iter().map(|&p| f64::from(p)),
                reference.iter().copied(),
            );
            let label = format!(
                "{engine} {} {} {} {format}{}",
                case["model"].as_str().unwrap_or(""),
                spec["interpolation"].as_str().unwrap_or(""),
                spec["resize"].as_str().unwrap_or(""),
                if region.is_some() { " region" } else { "" }
            );
            // Reference: cv2.imdecode / cv2.cvtColor, the rule's geometry, the recipe's library resize
            // (cv2.resize or PIL.Image.resize), normalisation in float64, onnxruntime, softmax in float64.
            if diff.max_abs > bound {
                failures.push(format!("{label}: {diff} (bound {bound:e})"));
            }
            let ours = argmax(analysed.raw.iter().map(|&p| f64::from(p)));
            if ours != argmax(reference.iter().copied()) {
                failures.push(format!(
                    "{label}: arg-max {ours} differs from the reference's"
                ));
            }
            total.add(&diff);
        }
        eprintln!("whole path on {engine}, probabilities against the reference pipeline: {total}");
    }
    // The cases can see the bias of an earlier resize: one grey level too bright on a quarter of the values
    // moves the probabilities by more than the bound in every case (measured by the fixture on the reference).
    let sensitive = cases
        .iter()
        .filter(|c| c["bias_effect"].as_f64().unwrap_or(0.0) > TRACT_BOUND)
        .count();
    eprintln!(
        "cases in which a one-level bias on a quarter of the values exceeds {TRACT_BOUND:e}: {sensitive} of {}",
        cases.len()
    );
    assert!(
        sensitive * 10 >= cases.len() * 9,
        "the fixture's models are too insensitive: {sensitive} of {}",
        cases.len()
    );
    for format in [
        "png", "jpeg", "rgb8", "bgr8", "nv12", "i420", "yuyv", "uyvy", "i422", "i444",
    ] {
        assert!(formats_seen.contains(format), "no parity case for {format}");
    }
    assert!(
        failures.is_empty(),
        "{} failures:\n{}",
        failures.len(),
        failures.join("\n")
    );
}

/// A Y4M recording whose header states full range, replayed offline by the `framewise` binary: its reading
/// of the header, its frames and the engine together give the reference's probabilities.
#[test]
fn a_full_range_y4m_replayed_offline_gives_the_reference_probabilities() {
    let case = &index()["exact"]["y4m_parity"];
    let recording = fixtures().join(case["file"].as_str().expect("file"));
    let model = fixtures().join(case["model"].as_str().expect("model"));
    let dir = std::env::temp_dir().join(format!("framewise-y4m-parity-{}", std::process::id()));
    std::fs::create_dir_all(&dir).expect("temp dir");
    let out = dir.join("results.jsonl");
    let status = std::process::Command::new(binary("framewise"))
        .args(["replay", "--offline", "--filter", "none", "--model"])
        .arg(&model)
        .arg(&recording)
        .arg("--out")
        .arg(&out)
        .output()
        .expect("framewise runs");
    assert!(
        status.status.success(),
        "{}",
        String::from_utf8_lossy(&status.stderr)
    );
    let text = std::fs::read_to_string(&out).expect("results");
    let lines: Vec<Value> = text
        .lines()
        .map(|l| serde_json::from_str(l).expect("json"))
        .collect();
    assert_eq!(lines[0]["kind"], "header");
    assert!(
        lines[0]["settings"]["yuv_range"]
            .as_str()
            .is_some_and(|r| r.to_lowercase().contains("full")),
        "the header states the range the file gave: {}",
        lines[0]["settings"]
    );
    let expected = case["probs"].as_array().expect("probs");
    let frames: Vec<&Value> = lines.iter().filter(|l| l["kind"] == "result").collect();
    assert_eq!(frames.len(), expected.len());
    let mut total = Diff::default();
    for (record, want) in frames.iter().zip(expected) {
        // Reference: the ITU-R BT.601 full-range equations rounded to nearest (NumPy), cv2.resize
        // INTER_LINEAR, onnxruntime, softmax in float64.
        total.add(&Diff::of(floats(&record["raw"]), floats(want)));
    }
    eprintln!("full-range Y4M replayed offline (tract) against the reference: {total}");
    assert!(total.max_abs <= TRACT_BOUND, "{total}");
    let _ = std::fs::remove_dir_all(&dir);
}

/// Models as exporters write them (input dimensions -1, 0, named, absent; weights repeated among the inputs)
/// load on both engines, with their free dimensions fixed from the manifest, and give onnxruntime's numbers.
#[test]
fn exported_models_with_free_input_dimensions_load_and_equal_onnxruntime() {
    let variants = index()["exact"]["exported"]
        .as_array()
        .expect("exported")
        .clone();
    assert!(variants.len() >= 7);
    for variant in &variants {
        let name = variant["name"].as_str().expect("name");
        let package =
            ModelPackage::read(std::path::Path::new(variant["dir"].as_str().expect("dir")))
                .expect("package reads");
        for (engine, options, bound) in engines() {
            let model = Model::load_with(&package, None, &options)
                .unwrap_or_else(|e| panic!("{name} on {engine} refused: {e}"));
            let mut total = Diff::default();
            for case in variant["cases"].as_array().expect("cases") {
                let input = read_f32(case["input"].as_str().expect("input"));
                let got = model.infer(&input).expect("inference runs");
                // Reference: onnxruntime on the same graph with concrete input dimensions.
                total.add(&Diff::of(
                    got.iter().map(|&p| f64::from(p)),
                    floats(&case["probs"]),
                ));
            }
            eprintln!("exported model `{name}` on {engine}: {total}");
            assert!(total.max_abs <= bound, "{name} on {engine}: {total}");
        }
    }
}
