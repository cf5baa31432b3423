//! Plots, drawn as SVG and written as SVG or PNG by the path's extension. SVG is written directly (the
//! viewer renders the text); PNG is the same drawing rasterised with `resvg`, its text set in DejaVu Sans
//! embedded in the binary, so a machine with no fonts installed still gets labelled plots. Every plot
//! carries the caution and the model's identity in its footer.

use std::fmt::Write as _;
use std::path::{Path, PathBuf};
use std::sync::{Arc, OnceLock};

use anyhow::{Context, Result};
use framewise_engine::caution::CAUTION_SHORT;

use crate::output::{FrameRecord, Header};

/// Line colours per class (our own palette; colour-blind friendly hues).
pub const PALETTE: [&str; 8] = [
    "#1b6ca8", "#d1495b", "#2a9d8f", "#e9a23b", "#6d597a", "#5c946e", "#b5838d", "#3d405b",
];

/// Starts an SVG document on a white background.
fn svg_open(w: f64, h: f64) -> String {
    let mut s = String::new();
    let _ = writeln!(
        s,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{w}" height="{h}" font-family="sans-serif" font-size="12">"#
    );
    let _ = writeln!(s, r#"<rect width="100%" height="100%" fill="white"/>"#);
    s
}

/// The model's identity as a plot footer shows it, with its self-test's verdict where it was reported.
fn model_text(name: &str, version: &str, sha256: &str, engine: &str, self_test: &str) -> String {
    let line = format!("model {name} {version} sha256 {sha256} ({engine})");
    match self_test {
        "" | "?" => line,
        verdict => format!("{line}, self-test {verdict}"),
    }
}

/// [`model_text`] of a results file's model.
fn header_model_text(m: &crate::output::ModelInfo) -> String {
    let verdict = match m.self_test.verdict.as_str() {
        "passed" | "failed" => format!(
            "{} (max dev {:.1e})",
            m.self_test.verdict, m.self_test.largest_deviation
        ),
        other => other.to_string(),
    };
    model_text(&m.name, &m.version, &m.sha256, &m.engine, &verdict)
}

/// A string field of a JSON model identity, or "?".
fn model_field<'a>(model: &'a serde_json::Value, key: &str) -> &'a str {
    model[key].as_str().unwrap_or("?")
}

/// Ends the document with the footer every plot carries (the model's identity and the caution) and writes it.
/// The model line is shortened (the SHA-256 to its first 16 hex digits) when it would run past the right edge.
fn svg_finish(
    mut s: String,
    (left, w, h): (f64, f64, f64),
    model: &str,
    path: &Path,
) -> Result<PathBuf> {
    let model = fit_model_line(model, w - left - 10.0);
    let _ = writeln!(
        s,
        r##"<text x="{left}" y="{}" fill="#555">{}</text>"##,
        h - 30.0,
        escape(&model)
    );
    let _ = writeln!(
        s,
        r##"<text x="{left}" y="{}" fill="#a00">{}</text>"##,
        h - 12.0,
        escape(CAUTION_SHORT)
    );
    s.push_str("</svg>\n");
    match PlotFormat::of(path)? {
        PlotFormat::Svg => {
            std::fs::write(path, s).with_context(|| format!("writing {}", path.display()))?
        }
        PlotFormat::Png => {
            let png = rasterise(&s).with_context(|| format!("drawing {}", path.display()))?;
            std::fs::write(path, png).with_context(|| format!("writing {}", path.display()))?
        }
    }
    Ok(path.to_path_buf())
}

/// The file formats a plot can be written in, chosen by the path's extension.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum PlotFormat {
    Svg,
    Png,
}

impl PlotFormat {
    /// The format a path asks for; anything but `.svg` or `.png` (any case) is refused before work is done.
    pub fn of(path: &Path) -> Result<Self> {
        let ext = path
            .extension()
            .and_then(|e| e.to_str())
            .map(str::to_ascii_lowercase);
        match ext.as_deref() {
            Some("svg") => Ok(Self::Svg),
            Some("png") => Ok(Self::Png),
            _ => anyhow::bail!(
                "plot {}: the file name must end in .svg or .png (the format follows the extension)",
                path.display()
            ),
        }
    }
}

/// Pixels per SVG unit in PNG output: twice the drawing's size, sharp on high-density screens and in print.
const PNG_SCALE: f32 = 2.0;

/// Renders one of our SVG documents to PNG bytes, text in the embedded DejaVu Sans.
fn rasterise(svg: &str) -> Result<Vec<u8>> {
    static FONTS: OnceLock<Arc<resvg::usvg::fontdb::Database>> = OnceLock::new();
    let fontdb = FONTS
        .get_or_init(|| {
            let mut fonts = resvg::usvg::fontdb::Database::new();
            fonts.load_font_data(dejavu::sans::regular().to_vec());
            fonts.load_font_data(dejavu::sans::bold().to_vec());
            fonts.set_sans_serif_family("DejaVu Sans");
            Arc::new(fonts)
        })
        .clone();
    let opt = resvg::usvg::Options {
        font_family: "DejaVu Sans".to_owned(),
        fontdb,
        ..Default::default()
    };
    let tree = resvg::usvg::Tree::from_str(svg, &opt).context("parsing the drawing")?;
    let size = tree
        .size()
        .to_int_size()
        .scale_by(PNG_SCALE)
        .context("empty drawing")?;
    let mut pixmap = resvg::tiny_skia::Pixmap::new(size.width(), size.height())
        .context("drawing too large to rasterise")?;
    resvg::render(
        &tree,
        resvg::tiny_skia::Transform::from_scale(PNG_SCALE, PNG_SCALE),
        &mut pixmap.as_mut(),
    );
    pixmap.encode_png().context("encoding PNG")
}

/// An axis from 0 that holds `max`: a step of 1, 2 or 5 times a power of ten giving four to eight intervals,
/// and the axis end (a whole number of steps at or above `max`).
fn nice_axis(max: f64) -> (f64, f64) {
    let max = if max.is_finite() && max > 0.0 {
        max
    } else {
        1.0
    };
    let rough = max / 5.0;
    let power = 10f64.powf(rough.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .into_iter()
        .map(|m| m * power)
        .find(|&step| max / step <= 8.0)
        .unwrap_or(10.0 * power);
    (step, (max / step).ceil().max(1.0) * step)
}

/// A tick value with as many decimals as its axis step needs (0.2 steps: one decimal; 200: none).
fn tick_text(v: f64, step: f64) -> String {
    let decimals = (-step.log10().floor()).max(0.0) as usize;
    format!("{v:.decimals$}")
}

/// Average advance of a 12 px DejaVu Sans character, in SVG units (about 0.55 em; generous for digits).
const CHAR_WIDTH: f64 = 7.0;

/// The model line as given when it fits in `room` units, else with its 64-digit SHA-256 cut to 16 digits.
fn fit_model_line(model: &str, room: f64) -> String {
    if model.chars().count() as f64 * CHAR_WIDTH <= room {
        return model.to_string();
    }
    model
        .split(' ')
        .map(|word| {
            if word.len() == 64 && word.bytes().all(|b| b.is_ascii_hexdigit()) {
                format!("{}…", &word[..16])
            } else {
                word.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join(" ")
}

fn escape(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

/// Probability timeline per class (smoothed solid, raw faint), with the labels and the calls as bands
/// beneath. Returns the path written.
pub fn timeline(header: &Header, records: &[FrameRecord], path: &Path) -> Result<PathBuf> {
    let results: Vec<&FrameRecord> = records.iter().filter(|r| r.kind == "result").collect();
    let (w, h) = (1200.0, 560.0);
    let (left, right, top, plot_h) = (70.0, 20.0, 40.0, 300.0);
    let band_h = 22.0;
    let t0 = results.first().map_or(0.0, |r| r.t_ms);
    let t1 = results.last().map_or(1.0, |r| r.t_ms).max(t0 + 1.0);
    let x = |t: f64| left + (t - t0) / (t1 - t0) * (w - left - right);
    let y = |p: f64| top + (1.0 - p) * plot_h;
    let classes = &header.classes;
    let colour = |i: usize| PALETTE[i % PALETTE.len()];
    let mut s = svg_open(w, h);
    let _ = writeln!(
        s,
        r#"<text x="{left}" y="22" font-size="15">Class probabilities over time: {}</text>"#,
        escape(&header.source)
    );
    for p in [0.0, 0.25, 0.5, 0.75, 1.0] {
        let _ = writeln!(
            s,
            r##"<line x1="{left}" x2="{0}" y1="{1}" y2="{1}" stroke="#ddd"/><text x="{2}" y="{3}" text-anchor="end">{p:.2}</text>"##,
            w - right,
            y(p),
            left - 6.0,
            y(p) + 4.0
        );
    }
    let seconds = ((t1 - t0) / 1000.0).ceil() as usize;
    let step = (seconds / 10).max(1);
    for sec in (0..=seconds).step_by(step) {
        let xx = x(t0 + sec as f64 * 1000.0);
        let _ = writeln!(
            s,
            r#"<text x="{xx}" y="{}" text-anchor="middle">{sec} s</text>"#,
            top + plot_h + 16.0
        );
    }
    for (c, _) in classes.iter().enumerate() {
        for (field, width, opacity) in [("raw", 1.0, 0.35), ("smoothed", 2.0, 1.0)] {
            let mut d = String::new();
            for r in &results {
                let v = if field == "raw" { &r.raw } else { &r.smoothed };
                if let Some(p) = v.get(c) {
                    let _ = write!(
                        d,
                        "{}{:.1},{:.1} ",
                        if d.is_empty() { "M" } else { "L" },
                        x(r.t_ms),
                        y(f64::from(*p))
                    );
                }
            }
            let _ = writeln!(
                s,
                r#"<path d="{d}" fill="none" stroke="{}" stroke-width="{width}" opacity="{opacity}"/>"#,
                colour(c)
            );
        }
    }
    // Bands: label, then call.
    for (row, name) in [(0, "label"), (1, "call")] {
        let by = top + plot_h + 30.0 + row as f64 * (band_h + 8.0);
        let _ = writeln!(
            s,
            r#"<text x="{}" y="{}" text-anchor="end">{name}</text>"#,
            left - 6.0,
            by + 15.0
        );
        for (i, r) in results.iter().enumerate() {
            let value = if row == 0 {
                r.label.as_deref()
            } else {
                r.decision.as_deref()
            };
            let Some(ci) = value.and_then(|v| classes.iter().position(|c| c == v)) else {
                continue;
            };
            let next_t = results.get(i + 1).map_or(r.t_ms, |n| n.t_ms);
            let _ = writeln!(
                s,
                r#"<rect x="{:.1}" y="{by}" width="{:.1}" height="{band_h}" fill="{}"/>"#,
                x(r.t_ms),
                (x(next_t) - x(r.t_ms)).max(0.5),
                colour(ci)
            );
        }
    }
    let ly = top + plot_h + 100.0;
    for (c, name) in classes.iter().enumerate() {
        let lx = left + c as f64 * 150.0;
        let _ = writeln!(
            s,
            r#"<rect x="{lx}" y="{ly}" width="14" height="14" fill="{}"/><text x="{}" y="{}">{}</text>"#,
            colour(c),
            lx + 20.0,
            ly + 12.0,
            escape(name)
        );
    }
    let _ = writeln!(
        s,
        r##"<text x="{}" y="{}" fill="#555">faint: per-frame (raw); solid: smoothed; white in a band: undetermined</text>"##,
        left,
        ly + 36.0
    );
    svg_finish(s, (left, w, h), &header_model_text(&header.model), path)
}

/// End-to-end latency by percentile (x: percentile on a log scale of 1/(1-q), as latency work shows tails),
/// with the caution and the model's identity in the footer.
pub fn percentiles(
    report: &crate::bench::BenchReport,
    h: &hdrhistogram::Histogram<u64>,
    path: &Path,
) -> Result<PathBuf> {
    let (w, hgt) = (900.0, 480.0);
    let (left, right, top, plot_h) = (70.0, 30.0, 40.0, 340.0);
    let qs: Vec<f64> = (0..=400)
        .map(|i| 1.0 - 10f64.powf(-(i as f64) / 100.0))
        .collect(); // 0 .. 99.99%
    let values: Vec<f64> = qs
        .iter()
        .map(|&q| h.value_at_quantile(q) as f64 / 1000.0)
        .collect();
    let vmax = values.iter().copied().fold(1.0, f64::max) * 1.1;
    let x = |i: usize| left + i as f64 / 400.0 * (w - left - right);
    let y = |v: f64| top + (1.0 - v / vmax) * plot_h;
    let mut s = svg_open(w, hgt);
    let _ = writeln!(
        s,
        r#"<text x="{left}" y="22" font-size="15">End-to-end latency by percentile: {} sessions x {} fps, {}</text>"#,
        report.sessions,
        report.fps_per_session,
        escape(&report.frame)
    );
    for (i, label) in [
        (0, "0%"),
        (100, "90%"),
        (200, "99%"),
        (300, "99.9%"),
        (400, "99.99%"),
    ] {
        let _ = writeln!(
            s,
            r##"<line x1="{0}" x2="{0}" y1="{top}" y2="{1}" stroke="#ddd"/><text x="{0}" y="{2}" text-anchor="middle">{label}</text>"##,
            x(i),
            top + plot_h,
            top + plot_h + 16.0
        );
    }
    for k in 0..=4 {
        let v = vmax * k as f64 / 4.0;
        let _ = writeln!(
            s,
            r##"<line x1="{left}" x2="{0}" y1="{1}" y2="{1}" stroke="#eee"/><text x="{2}" y="{3}" text-anchor="end">{v:.1} ms</text>"##,
            w - right,
            y(v),
            left - 6.0,
            y(v) + 4.0
        );
    }
    let d: String = values
        .iter()
        .enumerate()
        .map(|(i, v)| {
            format!(
                "{}{:.1},{:.1} ",
                if i == 0 { "M" } else { "L" },
                x(i),
                y(*v)
            )
        })
        .collect();
    let _ = writeln!(
        s,
        r#"<path d="{d}" fill="none" stroke="{}" stroke-width="2"/>"#,
        PALETTE[0]
    );
    svg_finish(
        s,
        (left, w, hgt),
        &model_text(
            model_field(&report.model, "name"),
            model_field(&report.model, "version"),
            model_field(&report.model, "sha256"),
            model_field(&report.model, "engine"),
            model_field(&report.model["self_test"], "verdict"),
        ),
        path,
    )
}

/// The sweep's trade-off: median delay to a correct call against switches per minute, one point per filter.
pub fn sweep(header: &Header, points: &[crate::score::SweepPoint], path: &Path) -> Result<PathBuf> {
    let (w, h) = (900.0, 540.0);
    let (left, right, top, bottom) = (80.0, 40.0, 60.0, 90.0);
    let xs: Vec<f64> = points
        .iter()
        .map(|p| p.decisions.median_time_to_correct_ms.unwrap_or(0.0))
        .collect();
    let ys: Vec<f64> = points
        .iter()
        .map(|p| p.decisions.switches_per_minute)
        .collect();
    let (xstep, xmax) = nice_axis(xs.iter().copied().fold(100.0, f64::max));
    let (ystep, ymax) = nice_axis(ys.iter().copied().fold(1.0, f64::max));
    let x = |v: f64| left + v / xmax * (w - left - right);
    let y = |v: f64| top + (1.0 - v / ymax) * (h - top - bottom);
    let mut s = svg_open(w, h);
    let _ = writeln!(
        s,
        r#"<text x="{left}" y="22" font-size="15">Temporal filter sweep: delay against call switches</text>"#
    );
    let _ = writeln!(
        s,
        r##"<text x="{left}" y="40" fill="#555">{}</text>"##,
        escape(&header.source)
    );
    let ticks = |max: f64, step: f64| {
        (0..)
            .map(move |k| k as f64 * step)
            .take_while(move |v| *v <= max + step * 1e-9)
    };
    for vx in ticks(xmax, xstep) {
        let _ = writeln!(
            s,
            r##"<line x1="{0:.1}" x2="{0:.1}" y1="{top}" y2="{1}" stroke="#eee"/><text x="{0:.1}" y="{2}" text-anchor="middle">{3}</text>"##,
            x(vx),
            h - bottom,
            h - bottom + 16.0,
            tick_text(vx, xstep),
        );
    }
    for vy in ticks(ymax, ystep) {
        let _ = writeln!(
            s,
            r##"<line x1="{left}" x2="{0}" y1="{1:.1}" y2="{1:.1}" stroke="#eee"/><text x="{2}" y="{3:.1}" text-anchor="end">{4}</text>"##,
            w - right,
            y(vy),
            left - 6.0,
            y(vy) + 4.0,
            tick_text(vy, ystep)
        );
    }
    let _ = writeln!(
        s,
        r#"<text x="{}" y="{}" text-anchor="middle">median time to a correct call (ms)</text>"#,
        (left + w - right) / 2.0,
        h - bottom + 34.0
    );
    let _ = writeln!(
        s,
        r#"<text x="18" y="{}" transform="rotate(-90 18 {})" text-anchor="middle">call switches per minute</text>"#,
        (top + h - bottom) / 2.0,
        (top + h - bottom) / 2.0
    );
    let colour = |filter: &str| match filter.split(':').next().unwrap_or("") {
        "exp" => PALETTE[0],
        "window" => PALETTE[1],
        "forward" => PALETTE[2],
        _ => PALETTE[3],
    };
    for (i, p) in points.iter().enumerate() {
        let _ = writeln!(
            s,
            r#"<circle cx="{:.1}" cy="{:.1}" r="5" fill="{}" fill-opacity="0.85"/>"#,
            x(xs[i]),
            y(ys[i]),
            colour(&p.filter)
        );
    }
    // One label per spot: filters whose points fall within a few units of each other share a label, and a
    // label that would overlap one already placed moves down a line.
    let mut groups: Vec<((f64, f64), Vec<&str>)> = Vec::new();
    for (i, p) in points.iter().enumerate() {
        let at = (x(xs[i]), y(ys[i]));
        match groups
            .iter_mut()
            .find(|(g, _)| (g.0 - at.0).abs() < 4.0 && (g.1 - at.1).abs() < 4.0)
        {
            Some((_, names)) => names.push(&p.filter),
            None => groups.push((at, vec![&p.filter])),
        }
    }
    let mut placed: Vec<(f64, f64, f64)> = Vec::new(); // (x, baseline y, width)
    for ((px, py), names) in &groups {
        let text = if names.len() <= 3 {
            names.join(", ")
        } else {
            format!("{}, {} and {} more", names[0], names[1], names.len() - 2)
        };
        let width = text.chars().count() as f64 * 6.0;
        // To the right of the marker, or to its left where the right edge would cut it.
        let lx = if px + 7.0 + width > w - 4.0 {
            px - 7.0 - width
        } else {
            px + 7.0
        };
        let mut ly = py - 4.0;
        while placed
            .iter()
            .any(|&(x0, y0, w0)| (ly - y0).abs() < 11.0 && lx < x0 + w0 && x0 < lx + width)
        {
            ly += 11.0;
        }
        placed.push((lx, ly, width));
        let _ = writeln!(
            s,
            r#"<text x="{lx:.1}" y="{ly:.1}" font-size="10">{}</text>"#,
            escape(&text)
        );
    }
    svg_finish(s, (left, w, h), &header_model_text(&header.model), path)
}

/// Reliability diagram: accuracy against mean top-class probability per bin, raw and smoothed, with the
/// diagonal of perfect calibration; marker area follows the bin's frame count.
pub fn reliability(header: &Header, report: &crate::score::Report, path: &Path) -> Result<PathBuf> {
    let (w, h) = (640.0, 620.0);
    let (left, top, side) = (80.0, 50.0, 460.0);
    let x = |v: f64| left + v * side;
    let y = |v: f64| top + (1.0 - v) * side;
    let mut s = svg_open(w, h);
    let _ = writeln!(
        s,
        r#"<text x="{left}" y="24" font-size="15">Reliability diagram (10 equal-width bins of the top-class probability)</text>"#
    );
    for k in 0..=5 {
        let v = k as f64 / 5.0;
        let _ = writeln!(
            s,
            r##"<line x1="{0}" x2="{0}" y1="{top}" y2="{1}" stroke="#eee"/><line x1="{left}" x2="{2}" y1="{3}" y2="{3}" stroke="#eee"/><text x="{0}" y="{4}" text-anchor="middle">{v:.1}</text><text x="{5}" y="{6}" text-anchor="end">{v:.1}</text>"##,
            x(v),
            top + side,
            left + side,
            y(v),
            top + side + 16.0,
            left - 6.0,
            y(v) + 4.0
        );
    }
    let _ = writeln!(
        s,
        r##"<line x1="{}" y1="{}" x2="{}" y2="{}" stroke="#999" stroke-dasharray="4 4"/>"##,
        x(0.0),
        y(0.0),
        x(1.0),
        y(1.0)
    );
    let _ = writeln!(
        s,
        r#"<text x="{}" y="{}" text-anchor="middle">mean top-class probability</text>"#,
        left + side / 2.0,
        top + side + 34.0
    );
    let _ = writeln!(
        s,
        r#"<text x="20" y="{0}" transform="rotate(-90 20 {0})" text-anchor="middle">share correct</text>"#,
        top + side / 2.0
    );
    for (i, (name, metrics)) in [("raw", &report.raw), ("smoothed", &report.smoothed)]
        .iter()
        .enumerate()
    {
        let colour = PALETTE[i];
        let total = metrics.frames.max(1) as f64;
        let points: Vec<_> = metrics.calibration.iter().filter(|b| b.count > 0).collect();
        let d: String = points
            .iter()
            .enumerate()
            .map(|(k, b)| {
                format!(
                    "{}{:.1},{:.1} ",
                    if k == 0 { "M" } else { "L" },
                    x(b.mean_confidence),
                    y(b.accuracy)
                )
            })
            .collect();
        let _ = writeln!(
            s,
            r#"<path d="{d}" fill="none" stroke="{colour}" stroke-width="2"/>"#
        );
        for b in &points {
            let r = 3.0 + 12.0 * (b.count as f64 / total).sqrt();
            let _ = writeln!(
                s,
                r#"<circle cx="{:.1}" cy="{:.1}" r="{r:.1}" fill="{colour}" opacity="0.5"/>"#,
                x(b.mean_confidence),
                y(b.accuracy)
            );
        }
        let _ = writeln!(
            s,
            r#"<rect x="{}" y="{}" width="14" height="14" fill="{colour}"/><text x="{}" y="{}">{name} (ECE {:.3})</text>"#,
            left + 10.0,
            top + 10.0 + i as f64 * 20.0,
            left + 30.0,
            top + 22.0 + i as f64 * 20.0,
            metrics.ece
        );
    }
    svg_finish(s, (left, w, h), &header_model_text(&header.model), path)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_long_model_line_keeps_the_start_of_its_hash() {
        let sha = "388c05cc641930537baf222c0998b3a7c4f379268dbafca25c90763b71e688c3";
        let line = model_text("phantom-zones", "1.0.0", sha, "tract", "");
        assert_eq!(fit_model_line(&line, 2000.0), line, "fits: unchanged");
        assert_eq!(
            fit_model_line(&line, 400.0),
            "model phantom-zones 1.0.0 sha256 388c05cc64193053… (tract)"
        );
    }

    #[test]
    fn axes_end_on_a_round_step() {
        for (max, step, end) in [
            (843.0, 200.0, 1000.0),
            (83.2, 20.0, 100.0),
            (1.0, 0.2, 1.0),
            (0.0, 0.2, 1.0),
            (45.4, 10.0, 50.0),
            (7.0, 1.0, 7.0),
        ] {
            let (s, e) = nice_axis(max);
            assert!(
                (s - step).abs() < 1e-9 && (e - end).abs() < 1e-9,
                "{max}: {s} {e}"
            );
        }
        assert_eq!(tick_text(0.6000000000000001, 0.2), "0.6");
        assert_eq!(tick_text(400.0, 200.0), "400");
    }

    #[test]
    fn the_extension_chooses_the_format() {
        assert_eq!(
            PlotFormat::of(Path::new("a/b.SVG")).ok(),
            Some(PlotFormat::Svg)
        );
        assert_eq!(
            PlotFormat::of(Path::new("b.png")).ok(),
            Some(PlotFormat::Png)
        );
        assert!(PlotFormat::of(Path::new("b.jpg")).is_err());
        assert!(PlotFormat::of(Path::new("plot")).is_err());
    }
}
