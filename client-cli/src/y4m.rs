//! Y4M (YUV4MPEG2) files: the header, frame offsets, and frames as the engine takes them.
//!
//! 4:2:0 frames go as I420, 4:2:2 as packed YUYV (planes interleaved), 4:4:4 converted to RGB with the
//! session's default YUV reading (BT.601 limited range, the usual for Y4M).

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
        let (w, h) = (self.width as usize, self.height as usize);
        Ok(match self.chroma {
            Chroma::C420 => FrameData {
                format: PixelFormat::I420,
                width: self.width,
                height: self.height,
                data: planes,
            },
            Chroma::C422 => {
                let cw = w.div_ceil(2);
                let (y, rest) = planes.split_at(w * h);
                let (u, v) = rest.split_at(cw * h);
                let mut packed = vec![0u8; w.div_ceil(2) * 4 * h];
                for row in 0..h {
                    for cx in 0..cw {
                        let o = (row * cw + cx) * 4;
                        packed[o] = y[row * w + 2 * cx];
                        packed[o + 1] = u[row * cw + cx];
                        packed[o + 2] = y[row * w + (2 * cx + 1).min(w - 1)];
                        packed[o + 3] = v[row * cw + cx];
                    }
                }
                FrameData {
                    format: PixelFormat::Yuyv,
                    width: (cw * 2) as u32,
                    height: self.height,
                    data: packed,
                }
            }
            Chroma::C444 => {
                let rgb = framewise_engine::frame::yuv444_planar_to_rgb(
                    &planes,
                    self.width,
                    self.height,
                    Default::default(),
                )
                .map_err(|e| anyhow::anyhow!("{e}"))?;
                FrameData {
                    format: PixelFormat::Rgb8,
                    width: self.width,
                    height: self.height,
                    data: rgb,
                }
            }
        })
    }
}
