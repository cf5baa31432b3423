//! Every resize recipe against the library it is named after, value by value, over a grid of sizes (shrink,
//! enlarge, whole and fractional factors, odd sizes, one pixel, extreme aspect ratios) and under every resize
//! rule. The 8-bit recipes claim bit-exactness: zero differing values. Fixtures: `tests/reference/exact.py`.

use std::collections::BTreeMap;

use framewise_engine::frame::RgbView;
use framewise_engine::manifest::{ColourOrder, InputSpec, Layout, ResizeRule};
use framewise_engine::preprocess::Preprocessor;
use framewise_engine::resize::{Recipe, Resizer};
use framewise_tests::{Diff, index, read_bytes, read_f32};
use serde_json::Value;

fn size(v: &Value, w: &str, h: &str) -> (u32, u32) {
    let n = |k: &str| v[k].as_u64().expect("size") as u32;
    (n(w), n(h))
}

#[test]
fn every_recipe_equals_its_library_over_the_size_grid() {
    let cases = index()["exact"]["resize"]["grid"]
        .as_array()
        .expect("grid")
        .clone();
    assert!(cases.len() >= 150, "{} grid cases", cases.len());
    let mut resizer = Resizer::default();
    let mut totals: BTreeMap<&str, Diff> = BTreeMap::new();
    let mut ipp = Diff::default();
    let mut failures = Vec::new();
    for case in &cases {
        let (w, h) = size(case, "width", "height");
        let target = &case["target"];
        let (tw, th) = (
            target[0].as_u64().expect("tw") as u32,
            target[1].as_u64().expect("th") as u32,
        );
        let source = read_bytes(case["source"].as_str().expect("source"));
        let view = RgbView {
            width: w,
            height: h,
            data: &source,
        };
        for recipe in Recipe::ALL {
            let file = case["expected"][recipe.name()].as_str().expect("expected");
            let diff = if recipe.is_float() {
                let mut ours = Vec::new();
                resizer.resize_f32(&view, (0, 0, w, h), tw, th, &mut ours);
                let theirs = read_f32(file);
                // The IPP path OpenCV takes by default for float32 is another arithmetic: reported only.
                ipp.add(&Diff::of(
                    ours.iter().map(|&v| f64::from(v)),
                    read_f32(case["float_ipp"].as_str().expect("ipp"))
                        .iter()
                        .map(|&v| f64::from(v)),
                ));
                Diff::of(
                    ours.iter().map(|&v| f64::from(v)),
                    theirs.iter().map(|&v| f64::from(v)),
                )
            } else {
                let mut ours = Vec::new();
                resizer.resize_u8(recipe, &view, (0, 0, w, h), tw, th, &mut ours);
                Diff::bytes(&ours, &read_bytes(file))
            };
            // Reference: `recipe.reference()`, the library call in the fixture (OpenCV 5.0, Pillow 13.0;
            // float-bilinear with cv2.ipp.setUseIPP(False)). Every recipe claims equality: zero differences.
            if diff.differing > 0 {
                failures.push(format!(
                    "{recipe} {w}x{h} -> {tw}x{th}: {diff} against {}",
                    recipe.reference()
                ));
            }
            totals.entry(recipe.name()).or_default().add(&diff);
        }
    }
    for (name, diff) in &totals {
        eprintln!("resize grid, {name}: {diff}");
    }
    eprintln!("resize grid, float-bilinear against OpenCV's default (IPP) float32 path: {ipp}");
    assert!(
        failures.is_empty(),
        "{} cases differ:\n{}",
        failures.len(),
        failures.join("\n")
    );
}

fn spec(case: &Value) -> InputSpec {
    let s = &case["spec"];
    let text = |k: &str| s[k].as_str().expect("spec field").to_string();
    InputSpec {
        tensor: "x".into(),
        layout: Layout::Nhwc,
        width: s["width"].as_u64().expect("w") as u32,
        height: s["height"].as_u64().expect("h") as u32,
        colour_order: ColourOrder::Rgb,
        scale: 1.0,
        mean: [0.0; 3],
        std: [1.0; 3],
        resize: match text("resize").as_str() {
            "stretch" => ResizeRule::Stretch,
            "centre_crop" => ResizeRule::CentreCrop,
            _ => ResizeRule::Letterbox,
        },
        interpolation: Recipe::from_name(&text("interpolation")).expect("recipe"),
        letterbox_fill: s["letterbox_fill"].as_u64().expect("fill") as u8,
    }
}

/// The recipes under each rule (stretch, centre crop, letterbox with a grey fill), through the manifest's
/// whole preprocessing: with scale 1, mean 0 and std 1 in NHWC order the tensor is the picture itself.
#[test]
fn every_recipe_under_every_rule_gives_the_reference_tensor() {
    let cases = index()["exact"]["resize"]["rules"]
        .as_array()
        .expect("rules")
        .clone();
    assert_eq!(cases.len() % 15, 0, "every recipe under every rule");
    let mut pre = Preprocessor::new();
    let mut tensor = Vec::new();
    let mut total = Diff::default();
    let mut failures = Vec::new();
    for case in &cases {
        let (w, h) = size(case, "width", "height");
        let source = read_bytes(case["source"].as_str().expect("source"));
        let view = RgbView {
            width: w,
            height: h,
            data: &source,
        };
        let spec = spec(case);
        pre.prepare_view(&spec, view, &mut tensor);
        let expected = read_f32(case["expected"].as_str().expect("expected"));
        let diff = Diff::of(
            tensor.iter().map(|&v| f64::from(v)),
            expected.iter().map(|&v| f64::from(v)),
        );
        // Reference: the rule's crop or placement (framewise's documented geometry), the recipe's library call
        // (cv2.resize / PIL.Image.resize), the fill around a letterbox.
        if diff.differing > 0 {
            failures.push(format!(
                "{} {:?} {w}x{h} -> {}x{}: {diff}",
                spec.interpolation, spec.resize, spec.width, spec.height
            ));
        }
        total.add(&diff);
    }
    eprintln!("recipes under the resize rules: {total}");
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}
