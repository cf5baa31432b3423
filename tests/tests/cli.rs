//! The command-line client's parts against references: scoring against scikit-learn, latency percentiles
//! against NumPy, Y4M reading against planes NumPy wrote, and `replay --resume`.

use framewise_cli::recording::Recording;
use framewise_engine::PixelFormat;
use framewise_engine::latency::{new_histogram, percentiles};
use framewise_engine::scoring::frame_metrics;
use framewise_tests::{byte_diff, fixtures, index, read_bytes};

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
            // Reference: the planes NumPy wrote into the file.
            match clip["chroma"].as_str().expect("chroma") {
                "420jpeg" => {
                    assert_eq!(frame.format, PixelFormat::I420);
                    assert_eq!(frame.data, planes);
                }
                "422" => {
                    assert_eq!(frame.format, PixelFormat::Yuyv);
                    let (y, rest) = planes.split_at(w * h);
                    let (u, v) = rest.split_at(w / 2 * h);
                    let luma: Vec<u8> = frame
                        .data
                        .chunks_exact(4)
                        .flat_map(|q| [q[0], q[2]])
                        .collect();
                    let cb: Vec<u8> = frame.data.chunks_exact(4).map(|q| q[1]).collect();
                    let cr: Vec<u8> = frame.data.chunks_exact(4).map(|q| q[3]).collect();
                    assert_eq!((luma.as_slice(), cb.as_slice(), cr.as_slice()), (y, u, v));
                }
                _ => {
                    assert_eq!(frame.format, PixelFormat::Rgb8);
                    let expected = read_bytes(clip["rgb"][i].as_str().expect("rgb"));
                    let (max, _) = byte_diff(&frame.data, &expected);
                    // Reference: the ITU-R BT.601 limited-range equations in NumPy.
                    assert!(max <= 2, "4:4:4 frame {i}: max difference {max}");
                }
            }
        }
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
