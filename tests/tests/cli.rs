//! The command-line client's parts against references: scoring against scikit-learn, latency percentiles
//! against NumPy, Y4M reading against planes NumPy wrote, and `replay --resume`.

use framewise_cli::recording::Recording;
use framewise_engine::PixelFormat;
use framewise_engine::latency::{new_histogram, percentiles};
use framewise_engine::scoring::frame_metrics;
use framewise_tests::{fixtures, index, read_bytes};

#[test]
fn metrics_match_scikit_learn() {
    for case in index()["metrics"].as_array().expect("cases") {
        let k = case["k"].as_u64().expect("k") as usize;
        let labels: Vec<usize> = case["labels"]
            .as_array()
            .expect("labels")
            .iter()
            .map(|v| v.as_u64().expect("label") as usize)
            .collect();
        let probs: Vec<Vec<f32>> = case["probs"]
            .as_array()
            .expect("probs")
            .iter()
            .map(|row| {
                row.as_array()
                    .expect("row")
                    .iter()
                    .map(|v| v.as_f64().expect("p") as f32)
                    .collect()
            })
            .collect();
        let m = frame_metrics(&probs, &labels, k);
        for c in 0..k {
            let theirs = case["roc_auc"][c].as_f64().expect("auc");
            let ours = m.roc_auc[c].expect("both classes present");
            // Reference: sklearn.metrics.roc_auc_score(labels == c, probs[:, c]).
            assert!(
                (ours - theirs).abs() < 1e-12,
                "class {c}: AUC {ours} vs scikit-learn {theirs}"
            );
        }
        let confusion: Vec<Vec<u64>> =
            serde_json::from_value(case["confusion"].clone()).expect("matrix");
        // Reference: sklearn.metrics.confusion_matrix(labels, argmax).
        assert_eq!(m.confusion, confusion);
        // Reference: ECE from sklearn.calibration.calibration_curve(strategy="uniform", n_bins=10) weighted by
        // the bins' counts.
        let ece = case["ece"].as_f64().expect("ece");
        assert!((m.ece - ece).abs() < 1e-9, "ECE {} vs {ece}", m.ece);
        assert!((m.accuracy - case["accuracy"].as_f64().expect("acc")).abs() < 1e-12);
    }
}

#[test]
fn latency_percentiles_match_numpy_within_hdr_precision() {
    let case = &index()["percentiles"];
    let mut h = new_histogram();
    for v in case["samples"].as_array().expect("samples") {
        h.record(v.as_u64().expect("sample")).expect("records");
    }
    let p = percentiles("total", &h);
    let ours = [p.p50, p.p90, p.p99, p.p999, p.max];
    let expected = case["expected"].as_array().expect("expected");
    let around = case["around"].as_array().expect("around");
    for (i, ours) in ours.iter().enumerate() {
        let ours = *ours as f64;
        let theirs = expected[i].as_f64().expect("value");
        let (below, above) = (
            around[i][0].as_f64().expect("below"),
            around[i][1].as_f64().expect("above"),
        );
        // Reference: numpy.percentile(method="inverted_cdf"). HdrHistogram (3 significant figures) reports the
        // highest value equivalent to a sample (up to 0.1% above it) and may round the rank to the
        // neighbouring sample, so ours lies between the samples one rank below and above, within 0.1%.
        assert!(
            ours >= below * (1.0 - 1e-3) && ours <= above * (1.0 + 1e-3),
            "q{}: ours {ours}, NumPy {theirs} (neighbours {below}..{above})",
            case["q"][i]
        );
    }
}

#[test]
fn y4m_reading_matches_the_planes_numpy_wrote() {
    let y4m = &index()["y4m"];
    for clip in y4m["clips"].as_array().expect("clips") {
        let path = fixtures().join(clip["file"].as_str().expect("file"));
        let rec = Recording::open(&path).expect("opens");
        let (w, h) = (
            clip["width"].as_u64().expect("w") as usize,
            clip["height"].as_u64().expect("h") as usize,
        );
        assert_eq!(
            rec.frames.len() as u64,
            clip["frames"].as_u64().expect("frames")
        );
        assert!(rec.warnings.is_empty(), "{:?}", rec.warnings);
        assert!(
            (rec.frames[1].timestamp_ms - clip["interval_ms"].as_f64().expect("interval")).abs()
                < 1e-9
        );
        for (i, entry) in rec.frames.iter().enumerate() {
            let frame = rec.read(entry).expect("reads");
            let planes = read_bytes(clip["planes"][i].as_str().expect("planes"));
            // Reference: the planes NumPy wrote into the file, sent as they are (planar, any size) so that the
            // session's YUV settings read every layout.
            let format = match clip["chroma"].as_str().expect("chroma") {
                "420jpeg" => PixelFormat::I420,
                "422" => PixelFormat::I422,
                _ => PixelFormat::I444,
            };
            assert_eq!(
                (frame.format, frame.width, frame.height),
                (format, w as u32, h as u32)
            );
            assert_eq!(frame.data, planes, "frame {i}");
        }
        // The range the header states (XCOLORRANGE), used when --yuv is not given.
        let stated = match clip["range"].as_str() {
            Some("full") => Some(framewise_engine::YuvRange::Full),
            Some(_) => Some(framewise_engine::YuvRange::Limited),
            None => None,
        };
        assert_eq!(rec.yuv_range(), stated, "{}", clip["file"]);
    }
    let truncated = &y4m["truncated"];
    let rec = Recording::open(&fixtures().join(truncated["file"].as_str().expect("file")))
        .expect("opens");
    assert_eq!(
        rec.frames.len() as u64,
        truncated["whole_frames"].as_u64().expect("n")
    );
    assert!(
        rec.warnings.iter().any(|w| w.contains("truncated")),
        "{:?}",
        rec.warnings
    );
}

/// The command names itself as users type it.
#[test]
fn the_version_line_names_the_command() {
    let out = std::process::Command::new(framewise_tests::binary("framewise"))
        .arg("--version")
        .output()
        .expect("framewise runs");
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success() && text.starts_with("framewise "),
        "{text}"
    );
}
