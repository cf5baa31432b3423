//! `framewise-benchmarks preprocess`: one frame to the benchmark network's 224x224 input tensor (stretch),
//! per pixel format, frame size and resize recipe, through the pipeline's own `prepare` (decode or convert,
//! resize, normalise, quality measures). For the model's own recipe the time is also split into its parts.
//!
//! Decision support only, not a diagnosis: framewise outputs are probabilities that can be wrong and must be
//! confirmed by a qualified clinician; check local regulations before any clinical use.

use std::time::Instant;

use anyhow::{Context, Result};
use framewise_engine::frame::{self, DecodeScratch, Needed, RgbImage};
use framewise_engine::pipeline::{self, FrameSpec, Scratch};
use framewise_engine::preprocess::{self as prep, Preprocessor};
use framewise_engine::resize::Recipe;
use framewise_engine::{FrameRef, Model, ModelPackage, PixelFormat};
use serde_json::json;

use crate::{bench_package, frames_of, summary};

/// Runs the benchmark and prints a Markdown table; returns the figures.
pub fn run(frames: usize, sizes: &[String], formats: &[String]) -> Result<serde_json::Value> {
    let (bench, _) = bench_package()?;
    let sizes: Vec<(u32, u32)> = sizes
        .iter()
        .map(|s| {
            s.split_once('x')
                .and_then(|(w, h)| Some((w.trim().parse().ok()?, h.trim().parse().ok()?)))
                .with_context(|| format!("--sizes {s}: expected WIDTHxHEIGHT"))
        })
        .collect::<Result<_>>()?;
    let formats: Vec<PixelFormat> = if formats.is_empty() {
        PixelFormat::ALL
            .into_iter()
            .filter(|f| !f.is_encoded())
            .collect()
    } else {
        formats
            .iter()
            .map(|f| PixelFormat::from_name(f).with_context(|| format!("--formats {f}: unknown")))
            .collect::<Result<_>>()?
    };
    // One model per recipe: the benchmark network's package with the manifest naming that recipe.
    let models: Vec<(Recipe, Model)> = Recipe::ALL
        .into_iter()
        .map(|recipe| {
            let mut package: ModelPackage = bench.clone();
            package.manifest.input.interpolation = recipe;
            Ok((recipe, Model::load(&package, None)?))
        })
        .collect::<Result<_>>()?;
    let own = bench.manifest.input.interpolation;
    let names: Vec<&str> = Recipe::ALL.iter().map(|r| r.name()).collect();
    println!(
        "| format | frame | {} (median ms) | {own} p99 ms | {own}: convert / resize and normalise / quality, median ms |",
        names.join(" | ")
    );
    println!("|---|---|{}---|---|", "---|".repeat(names.len()));
    let mut rows = Vec::new();
    for &(w, h) in &sizes {
        for &format in &formats {
            let data = frames_of(format, w, h, 4)?;
            let refs: Vec<FrameRef<'_>> = data
                .iter()
                .map(|d| FrameRef {
                    format,
                    width: w,
                    height: h,
                    stride: 0,
                    data: d,
                })
                .collect();
            let frame_spec = FrameSpec::default();
            let mut medians = Vec::new();
            let mut own_p99 = 0.0;
            for (recipe, model) in &models {
                let mut scratch = Scratch::default();
                let mut times = Vec::with_capacity(frames);
                for (i, frame) in refs.iter().cycle().take(frames + 5).enumerate() {
                    let t = Instant::now();
                    pipeline::prepare(model, frame, &frame_spec, &mut scratch)?;
                    if i >= 5 {
                        times.push(t.elapsed().as_secs_f64() * 1000.0);
                    }
                }
                let (median, p99) = summary(times);
                if *recipe == own {
                    own_p99 = p99;
                }
                medians.push((*recipe, median));
            }
            let [convert, resize, quality] = parts(&models, own, &refs, frames)?;
            let cells: Vec<String> = medians.iter().map(|(_, m)| format!("{m:.3}")).collect();
            println!(
                "| {format} | {w}x{h} | {} | {own_p99:.3} | {convert:.3} / {resize:.3} / {quality:.3} |",
                cells.join(" | ")
            );
            let per_recipe: serde_json::Map<String, serde_json::Value> = medians
                .iter()
                .map(|(r, m)| (r.name().to_string(), json!(m)))
                .collect();
            rows.push(
                json!({"format": format.to_string(), "width": w, "height": h,
                "median_ms": per_recipe, "own_recipe": own.name(), "own_p99_ms": own_p99,
                "own_convert_median_ms": convert, "own_resize_normalise_median_ms": resize,
                "own_quality_median_ms": quality}),
            );
        }
    }
    Ok(json!({"preprocess": rows}))
}

/// The model's own recipe in its three parts (conversion of the rows the resize reads; resize and
/// normalisation; quality measures), timed one by one; medians in milliseconds.
fn parts(
    models: &[(Recipe, Model)],
    own: Recipe,
    refs: &[FrameRef<'_>],
    frames: usize,
) -> Result<[f64; 3]> {
    let Some((_, model)) = models.iter().find(|(r, _)| *r == own) else {
        return Ok([0.0; 3]);
    };
    let spec = &model.manifest().input;
    let frame_spec = FrameSpec::default();
    let (mut decode, mut rgb, mut pre, mut tensor) = (
        DecodeScratch::default(),
        RgbImage::default(),
        Preprocessor::new(),
        Vec::new(),
    );
    let mut rows = Vec::new();
    let mut times: [Vec<f64>; 3] = Default::default();
    for (i, frame) in refs.iter().cycle().take(frames + 5).enumerate() {
        let sparse = prep::rows_read(spec, frame.width, frame.height, &mut rows);
        let needed = Needed::rows(sparse.then_some(rows.as_slice()));
        let t0 = Instant::now();
        let view = frame::read_rgb(
            frame,
            None,
            frame_spec.yuv,
            &frame_spec.limits,
            &mut decode,
            &mut rgb,
            &needed,
        )?;
        let t1 = Instant::now();
        let prepared = pre.prepare_view(spec, view, &mut tensor);
        let t2 = Instant::now();
        let (pw, ph) = prepared.size;
        std::hint::black_box(framewise_engine::quality::measure(
            prepared.luma,
            pw as usize,
            ph as usize,
        ));
        let t3 = Instant::now();
        if i >= 5 {
            for (part, (a, b)) in times.iter_mut().zip([(t0, t1), (t1, t2), (t2, t3)]) {
                part.push((b - a).as_secs_f64() * 1000.0);
            }
        }
    }
    Ok(times.map(|t| summary(t).0))
}
