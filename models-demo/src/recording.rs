//! Writes synthetic recordings as framewise reads them: a folder of PNG frames in name order and a
//! `labels.csv` (file, timestamp in ms, label), the caution at the top of the CSV.

use std::io::Write;
use std::path::Path;

use anyhow::{Context, Result};

use crate::phantom::{CLASSES, Drum, SweepFrame, random_view, sweep};
use crate::rng::SplitMix64;

/// The header line every CSV written by framewise starts with.
pub const CSV_CAUTION: &str = "# framewise synthetic demo data (invented bench-top phantom, no patient data). Decision support only, not a diagnosis.";

/// What to generate.
#[derive(Debug, Clone, Copy)]
pub enum RecordingKind {
    /// Independent random views, balanced over the classes (for training).
    Views { count: usize },
    /// A camera sweep at a frame rate for a duration (for replay and scoring).
    Sweep { seconds: f64, fps: f64 },
}

/// Frames of a recording, rendered lazily.
pub struct Recording {
    drum: Drum,
    frames: Vec<SweepFrame>,
    width: u32,
    height: u32,
}

impl Recording {
    /// Plans a recording from a seed.
    pub fn plan(kind: RecordingKind, seed: u64, width: u32, height: u32) -> Self {
        let mut rng = SplitMix64::new(seed);
        let drum = Drum::random(12, &mut rng);
        let frames = match kind {
            RecordingKind::Views { count } => (0..count)
                .map(|i| {
                    let view = random_view(&drum, &mut rng);
                    SweepFrame {
                        timestamp_ms: i as f64 * 1000.0 / 30.0,
                        label: drum.class_at(view.position),
                        view,
                    }
                })
                .collect(),
            RecordingKind::Sweep { seconds, fps } => sweep(&drum, seconds, fps, &mut rng),
        };
        Self {
            drum,
            frames,
            width,
            height,
        }
    }

    /// Number of frames.
    pub fn len(&self) -> usize {
        self.frames.len()
    }

    /// True when there are no frames.
    pub fn is_empty(&self) -> bool {
        self.frames.is_empty()
    }

    /// Frame width and height.
    pub fn size(&self) -> (u32, u32) {
        (self.width, self.height)
    }

    /// Timestamp (ms) and label index of frame `i`.
    pub fn meta(&self, i: usize) -> Option<(f64, usize)> {
        self.frames.get(i).map(|f| (f.timestamp_ms, f.label))
    }

    /// Renders frame `i` as packed RGB8.
    pub fn render(&self, i: usize) -> Option<Vec<u8>> {
        self.frames
            .get(i)
            .map(|f| self.drum.render(&f.view, self.width, self.height))
    }

    /// Writes the recording as PNG frames and `labels.csv` into `dir`, calling `progress` after each frame.
    pub fn write(&self, dir: &Path, mut progress: impl FnMut(usize)) -> Result<()> {
        std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
        let mut csv = String::new();
        csv.push_str(CSV_CAUTION);
        csv.push('\n');
        csv.push_str("file,timestamp_ms,label\n");
        for i in 0..self.frames.len() {
            let name = format!("frame_{i:06}.png");
            let pixels = self.render(i).unwrap_or_default();
            image::save_buffer(
                dir.join(&name),
                &pixels,
                self.width,
                self.height,
                image::ExtendedColorType::Rgb8,
            )
            .with_context(|| format!("writing {name}"))?;
            let (t, label) = self.meta(i).unwrap_or_default();
            csv.push_str(&format!("{name},{t:.3},{}\n", CLASSES[label]));
            progress(i + 1);
        }
        let mut file =
            std::fs::File::create(dir.join("labels.csv")).context("creating labels.csv")?;
        file.write_all(csv.as_bytes())
            .context("writing labels.csv")?;
        Ok(())
    }
}
