//! Y4M (YUV4MPEG2) files: the header, frame offsets, and frames as the engine takes them.
//!
//! The planes go as they are, as I420, I422 or I444 frames (any width and height), so every layout is read
//! with the session's YUV settings. The header's `XCOLORRANGE=FULL` or `=LIMITED` (written by the common
//! encoders) says the code range; without it, limited range is the format's convention.

use std::io::{BufRead, BufReader, Read, Seek, SeekFrom};
use std::path::Path;

use anyhow::{Context, Result, bail};
use framewise_engine::PixelFormat;

use crate::recording::FrameData;

/// Chroma layouts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Chroma {
    /// 4:2:0.
    C420,
    /// 4:2:2.
    C422,
    /// 4:4:4.
    C444,
}

/// What the header says, and where each whole frame's pixels start.
#[derive(Debug, Clone)]
pub struct Y4mInfo {
    /// Width.
    pub width: u32,
    /// Height.
    pub height: u32,
    /// Frame rate numerator and denominator.
    pub rate: (u32, u32),
    /// Chroma layout.
    pub chroma: Chroma,
    /// The code range the header states (`XCOLORRANGE`), if it states one.
    pub range: Option<framewise_engine::YuvRange>,
    /// Byte offsets of each whole frame's pixels.
    pub frames: Vec<u64>,
    /// Set when the file ends inside a frame.
    pub warning: Option<String>,
}

/// Largest accepted frame side.
const MAX_SIDE: u32 = 16384;

impl Y4mInfo {
    /// Frame interval in milliseconds.
    pub fn interval_ms(&self) -> f64 {
        1000.0 * f64::from(self.rate.1) / f64::from(self.rate.0)
    }

    /// Bytes of one frame's pixels.
    pub fn frame_bytes(&self) -> u64 {
        let (w, h) = (u64::from(self.width), u64::from(self.height));
        let (cw, ch) = match self.chroma {
            Chroma::C420 => (w.div_ceil(2), h.div_ceil(2)),
            Chroma::C422 => (w.div_ceil(2), h),
            Chroma::C444 => (w, h),
        };
        w * h + 2 * cw * ch
    }

    /// Parses the header and indexes the frames.
    pub fn read(path: &Path) -> Result<Self> {
        let file =
            std::fs::File::open(path).with_context(|| format!("opening {}", path.display()))?;
        let len = file.metadata()?.len();
        let mut reader = BufReader::new(file);
        let mut header = Vec::new();
        reader.by_ref().take(4096).read_until(b'\n', &mut header)?;
        let text = String::from_utf8_lossy(&header);
        let mut fields = text.trim_end().split(' ');
        if fields.next() != Some("YUV4MPEG2") {
            bail!(
                "{} is not a Y4M file (no YUV4MPEG2 signature)",
                path.display()
            );
        }
        let (mut width, mut height, mut rate, mut chroma) =
            (0u32, 0u32, (30u32, 1u32), Chroma::C420);
        let mut range = None;
        for field in fields {
            // The tag is the field's first character; split on its boundary, not on byte 1, so that a
            // header holding non-ASCII text is skipped like any unknown field instead of panicking.
            let (tag, value) = field.split_at(field.chars().next().map_or(0, char::len_utf8));
            match tag {
                "W" => width = value.parse().context("Y4M width")?,
                "H" => height = value.parse().context("Y4M height")?,
                "F" => {
                    let (n, d) = value
                        .split_once(':')
                        .context("Y4M frame rate must be N:D")?;
                    rate = (
                        n.parse().context("Y4M frame rate")?,
                        d.parse().context("Y4M frame rate")?,
                    );
                }
                "C" => {
                    chroma = if value.starts_with("420") {
                        Chroma::C420
                    } else if value.starts_with("422") {
                        Chroma::C422
                    } else if value.starts_with("444") && !value.contains("alpha") {
                        Chroma::C444
                    } else {
                        bail!(
                            "Y4M colour space C{value} is not supported (420, 422 and 444 are; 8-bit only)"
                        );
                    };
                    let rest = &value[3.min(value.len())..];
                    if rest.starts_with('p') && rest[1..].starts_with(|c: char| c.is_ascii_digit())
                    {
                        bail!("Y4M colour space C{value}: only 8-bit samples are supported");
                    }
                }
                "X" => {
                    use framewise_engine::YuvRange;
                    range = match value.strip_prefix("COLORRANGE=") {
                        Some("FULL") => Some(YuvRange::Full),
                        Some("LIMITED") => Some(YuvRange::Limited),
                        _ => range,
                    };
                }
                _ => {}
            }
        }
        if width == 0 || height == 0 || width > MAX_SIDE || height > MAX_SIDE {
            bail!("Y4M size {width}x{height} is not usable (1..={MAX_SIDE} per side)");
        }
        if rate.0 == 0 || rate.1 == 0 {
            bail!("Y4M frame rate {}:{} is not usable", rate.0, rate.1);
        }
        let mut info = Self {
            width,
            height,
            rate,
            chroma,
            range,
            frames: Vec::new(),
            warning: None,
        };
        let frame_bytes = info.frame_bytes();
        let mut pos = header.len() as u64;
        loop {
            if pos >= len {
                break;
            }
            reader.seek(SeekFrom::Start(pos))?;
            let mut line = Vec::new();
            reader.by_ref().take(1024).read_until(b'\n', &mut line)?;
            if !line.starts_with(b"FRAME") || !line.ends_with(b"\n") {
                info.warning = Some(format!(
                    "the file ends inside the header of frame {}; {} whole frames read",
                    info.frames.len(),
                    info.frames.len()
                ));
                break;
            }
            let start = pos + line.len() as u64;
            if start + frame_bytes > len {
                info.warning = Some(format!(
                    "the file is truncated inside frame {} ({} of {frame_bytes} bytes); {} whole frames read",
                    info.frames.len(),
                    len - start,
                    info.frames.len()
                ));
                break;
            }
            info.frames.push(start);
            pos = start + frame_bytes;
        }
        Ok(info)
    }

    /// Reads one frame's pixels as the engine takes them.
    pub fn read_frame(&self, path: &Path, offset: u64) -> Result<FrameData> {
        let mut file =
            std::fs::File::open(path).with_context(|| format!("opening {}", path.display()))?;
        file.seek(SeekFrom::Start(offset))?;
        let mut planes = vec![0u8; self.frame_bytes() as usize];
        file.read_exact(&mut planes)
            .context("reading a Y4M frame")?;
        let format = match self.chroma {
            Chroma::C420 => PixelFormat::I420,
            Chroma::C422 => PixelFormat::I422,
            Chroma::C444 => PixelFormat::I444,
        };
        Ok(FrameData {
            format,
            width: self.width,
            height: self.height,
            data: planes,
        })
    }
}
