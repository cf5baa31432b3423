//! Recordings to replay: a folder of PNG/JPEG frames in name order with an optional `labels.csv`
//! (file, timestamp in ms, label), or a Y4M file.

use std::path::{Path, PathBuf};

use anyhow::{Context, Result, bail};
use framewise_engine::PixelFormat;

/// One frame of a recording, not yet read.
#[derive(Debug, Clone)]
pub struct FrameEntry {
    /// File name (folder recordings) or frame number (Y4M), for the output.
    pub name: String,
    /// Capture time in milliseconds.
    pub timestamp_ms: f64,
    /// Label, when the recording has one.
    pub label: Option<String>,
    source: Source,
}

#[derive(Debug, Clone)]
enum Source {
    File(PathBuf, PixelFormat),
    Y4m { offset: u64 },
}

/// A frame's bytes as they go to the engine or the server.
#[derive(Debug, Clone)]
pub struct FrameData {
    /// Pixel format.
    pub format: PixelFormat,
    /// Width (0 for encoded files).
    pub width: u32,
    /// Height (0 for encoded files).
    pub height: u32,
    /// The bytes.
    pub data: Vec<u8>,
}

/// A recording.
#[derive(Debug, Clone)]
pub struct Recording {
    /// Where it came from.
    pub path: PathBuf,
    /// Its frames in order.
    pub frames: Vec<FrameEntry>,
    /// Problems met while listing (unreadable CSV rows, missing files); the rest goes on.
    pub warnings: Vec<String>,
    y4m: Option<crate::y4m::Y4mInfo>,
}

/// Default frame interval when a folder has no timestamps: 30 frames per second.
pub const DEFAULT_INTERVAL_MS: f64 = 1000.0 / 30.0;

impl Recording {
    /// Opens a folder or a `.y4m` file.
    pub fn open(path: &Path) -> Result<Self> {
        if path.is_dir() {
            Self::open_folder(path)
        } else if path
            .extension()
            .is_some_and(|e| e.eq_ignore_ascii_case("y4m"))
        {
            let info = crate::y4m::Y4mInfo::read(path)?;
            let frames = info
                .frames
                .iter()
                .enumerate()
                .map(|(i, &offset)| FrameEntry {
                    name: format!("frame {i}"),
                    timestamp_ms: i as f64 * info.interval_ms(),
                    label: None,
                    source: Source::Y4m { offset },
                })
                .collect();
            let warnings = info.warning.clone().into_iter().collect();
            Ok(Self {
                path: path.to_path_buf(),
                frames,
                warnings,
                y4m: Some(info),
            })
        } else {
            bail!(
                "{} is neither a folder of frames nor a .y4m file",
                path.display()
            )
        }
    }

    fn open_folder(dir: &Path) -> Result<Self> {
        let mut warnings = Vec::new();
        let mut files: Vec<(String, PixelFormat)> = std::fs::read_dir(dir)
            .with_context(|| format!("listing {}", dir.display()))?
            .filter_map(|e| e.ok())
            .filter_map(|e| {
                let name = e.file_name().to_string_lossy().to_string();
                let ext = Path::new(&name)
                    .extension()?
                    .to_string_lossy()
                    .to_ascii_lowercase();
                let format = match ext.as_str() {
                    "png" => PixelFormat::Png,
                    "jpg" | "jpeg" => PixelFormat::Jpeg,
                    _ => return None,
                };
                Some((name, format))
            })
            .collect();
        files.sort_by(|a, b| a.0.cmp(&b.0));
        let labels_path = dir.join("labels.csv");
        let mut table: Option<std::collections::HashMap<String, (f64, String)>> = None;
        if labels_path.exists() {
            let text = std::fs::read_to_string(&labels_path)
                .with_context(|| format!("reading {}", labels_path.display()))?;
            let mut map = std::collections::HashMap::new();
            let mut header_seen = false;
            for (n, line) in text.lines().enumerate() {
                let line = line.trim();
                if line.is_empty() || line.starts_with('#') {
                    continue;
                }
                if !header_seen {
                    header_seen = true;
                    if line.to_ascii_lowercase().starts_with("file,") {
                        continue;
                    }
                }
                let parts: Vec<&str> = line.split(',').map(str::trim).collect();
                if parts.len() < 2 {
                    warnings.push(format!(
                        "labels.csv line {}: expected file,timestamp_ms[,label]",
                        n + 1
                    ));
                    continue;
                }
                let Ok(t) = parts[1].parse::<f64>() else {
                    warnings.push(format!(
                        "labels.csv line {}: timestamp `{}` is not a number",
                        n + 1,
                        parts[1]
                    ));
                    continue;
                };
                if !t.is_finite() {
                    warnings.push(format!(
                        "labels.csv line {}: timestamp is not finite",
                        n + 1
                    ));
                    continue;
                }
                map.insert(
                    parts[0].to_string(),
                    (t, parts.get(2).map(|s| s.to_string()).unwrap_or_default()),
                );
            }
            table = Some(map);
        }
        let mut frames = Vec::with_capacity(files.len());
        for (i, (name, format)) in files.into_iter().enumerate() {
            let (timestamp_ms, label) = match &table {
                Some(t) => match t.get(&name) {
                    Some((ts, label)) => (*ts, (!label.is_empty()).then(|| label.clone())),
                    None => {
                        warnings.push(format!(
                            "{name}: not in labels.csv; timestamp from its position"
                        ));
                        (i as f64 * DEFAULT_INTERVAL_MS, None)
                    }
                },
                None => (i as f64 * DEFAULT_INTERVAL_MS, None),
            };
            frames.push(FrameEntry {
                timestamp_ms,
                label,
                source: Source::File(dir.join(&name), format),
                name,
            });
        }
        if frames.is_empty() {
            bail!("{} holds no PNG or JPEG frames", dir.display());
        }
        Ok(Self {
            path: dir.to_path_buf(),
            frames,
            warnings,
            y4m: None,
        })
    }

    /// The YUV code range the recording states (a Y4M header's `XCOLORRANGE`), if any.
    pub fn yuv_range(&self) -> Option<framewise_engine::YuvRange> {
        self.y4m.as_ref().and_then(|info| info.range)
    }

    /// Reads one frame's bytes.
    pub fn read(&self, entry: &FrameEntry) -> Result<FrameData> {
        match &entry.source {
            Source::File(path, format) => {
                let data =
                    std::fs::read(path).with_context(|| format!("reading {}", path.display()))?;
                Ok(FrameData {
                    format: *format,
                    width: 0,
                    height: 0,
                    data,
                })
            }
            Source::Y4m { offset } => {
                let info = self.y4m.as_ref().context("Y4M details missing")?;
                info.read_frame(&self.path, *offset)
            }
        }
    }
}
