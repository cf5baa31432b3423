//! Resize recipes. Each reproduces one library's resize value for value, so that the tensor a model gets
//! here is the tensor its validation pipeline made: the manifest names the library, and the reference
//! checks compare every value with that library's own output over a grid of sizes.
//!
//! | recipe | the same values as | arithmetic |
//! |---|---|---|
//! | `opencv-linear` | `cv2.resize(img, size, interpolation=cv2.INTER_LINEAR)`, 8-bit | 11-bit fixed-point weights, exact horizontal sums, one rounding in the vertical pass |
//! | `opencv-area` | `cv2.resize(..., cv2.INTER_AREA)`, 8-bit, shrinking and enlarging | coverage weights in `f32` (integer factors: integer sums); enlarging as OpenCV's area-mode linear |
//! | `pillow-bilinear` | Pillow's `Image.resize(size, Image.Resampling.BILINEAR)` | triangle filter widened by the factor when shrinking (antialiasing), 22-bit fixed point, rounded to 8 bits after each pass |
//! | `pillow-bicubic` | Pillow's `Image.resize(size, Image.Resampling.BICUBIC)` | cubic convolution (a = -0.5), otherwise as `pillow-bilinear` |
//! | `float-bilinear` | `cv2.resize(img.astype(np.float32), size, interpolation=cv2.INTER_LINEAR)` | `f32` weights and sums, no rounding until the tensor |
//!
//! Every recipe resizes the crop alone (a crop is cut first, as `img[y:y+h, x:x+w]` or `Image.crop` does),
//! and replicates its edge pixels as its library does. The versions matched are the ones pinned in
//! `tests/reference/requirements.txt` (OpenCV 5.0, Pillow 13.0).

mod opencv;
mod pillow;

use serde::{Deserialize, Serialize};

use crate::frame::RgbView;

/// Channels of every picture resized here (packed RGB).
const CHANNELS: usize = 3;

/// A resize recipe, named after the library whose values it reproduces.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, Deserialize)]
#[serde(try_from = "String")]
pub enum Recipe {
    /// OpenCV's `INTER_LINEAR` on 8-bit pictures.
    #[serde(rename = "opencv-linear")]
    OpencvLinear,
    /// OpenCV's `INTER_AREA` on 8-bit pictures.
    #[serde(rename = "opencv-area")]
    OpencvArea,
    /// Pillow's `BILINEAR` (antialiasing when shrinking).
    #[serde(rename = "pillow-bilinear")]
    PillowBilinear,
    /// Pillow's `BICUBIC` (antialiasing when shrinking).
    #[serde(rename = "pillow-bicubic")]
    PillowBicubic,
    /// OpenCV's `INTER_LINEAR` on a `float32` picture: no rounding until the tensor.
    #[serde(rename = "float-bilinear")]
    FloatBilinear,
}

impl Recipe {
    /// Every recipe.
    pub const ALL: [Recipe; 5] = [
        Self::OpencvLinear,
        Self::OpencvArea,
        Self::PillowBilinear,
        Self::PillowBicubic,
        Self::FloatBilinear,
    ];

    /// The name a manifest uses.
    pub fn name(self) -> &'static str {
        match self {
            Self::OpencvLinear => "opencv-linear",
            Self::OpencvArea => "opencv-area",
            Self::PillowBilinear => "pillow-bilinear",
            Self::PillowBicubic => "pillow-bicubic",
            Self::FloatBilinear => "float-bilinear",
        }
    }

    /// The library call whose values the recipe gives.
    pub fn reference(self) -> &'static str {
        match self {
            Self::OpencvLinear => "cv2.resize(img, size, interpolation=cv2.INTER_LINEAR) on uint8",
            Self::OpencvArea => "cv2.resize(img, size, interpolation=cv2.INTER_AREA) on uint8",
            Self::PillowBilinear => "PIL.Image.resize(size, Image.Resampling.BILINEAR)",
            Self::PillowBicubic => "PIL.Image.resize(size, Image.Resampling.BICUBIC)",
            Self::FloatBilinear => {
                "cv2.resize(img.astype(np.float32), size, interpolation=cv2.INTER_LINEAR)"
            }
        }
    }

    /// True when the recipe's output is `f32` (no rounding to 8 bits).
    pub fn is_float(self) -> bool {
        self == Self::FloatBilinear
    }

    /// Parses [`Recipe::name`]. The names of earlier versions are refused with the name to use instead.
    pub fn from_name(name: &str) -> Result<Self, String> {
        if let Some(recipe) = Self::ALL.into_iter().find(|r| r.name() == name) {
            return Ok(recipe);
        }
        let names: Vec<&str> = Self::ALL.iter().map(|r| r.name()).collect();
        Err(match name {
            "bilinear" => "input.interpolation `bilinear` is a name of earlier versions, which only \
                 approximated OpenCV: write `opencv-linear` for cv2.resize INTER_LINEAR (what it meant), \
                 `pillow-bilinear` for Pillow's Image.resize BILINEAR, or `float-bilinear` for INTER_LINEAR \
                 on a float32 image"
                .to_string(),
            "area" => "input.interpolation `area` is a name of earlier versions, which only approximated \
                 OpenCV: write `opencv-area` for cv2.resize INTER_AREA (what it meant)"
                .to_string(),
            other => format!(
                "input.interpolation `{other}` is not a resize recipe; use one of {}",
                names.join(", ")
            ),
        })
    }
}

impl TryFrom<String> for Recipe {
    type Error = String;

    fn try_from(name: String) -> Result<Self, String> {
        Self::from_name(&name)
    }
}

impl std::fmt::Display for Recipe {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

/// A rectangle of a picture: left, top, width, height, in pixels.
pub type Rect = (u32, u32, u32, u32);

/// Per-session resizing state: the weights of the last sizes seen (a stream's frames keep their size, so
/// they are computed once) and the intermediate rows.
#[derive(Debug, Default)]
pub struct Resizer {
    opencv: opencv::State,
    pillow: pillow::State,
}

impl Resizer {
    /// Resizes the `crop` of `src` to `out_w` x `out_h` with an 8-bit recipe into `out` (packed RGB). A
    /// float recipe is rounded to nearest here; the tensor path uses [`Resizer::resize_f32`] for it.
    pub fn resize_u8(
        &mut self,
        recipe: Recipe,
        src: &RgbView<'_>,
        crop: Rect,
        out_w: u32,
        out_h: u32,
        out: &mut Vec<u8>,
    ) {
        let src = Source::new(src, crop);
        let (w, h) = (out_w as usize, out_h as usize);
        out.resize(w * h * CHANNELS, 0);
        match recipe {
            Recipe::OpencvLinear => self.opencv.linear(&src, w, h, out),
            Recipe::OpencvArea => self.opencv.area(&src, w, h, out),
            Recipe::PillowBilinear => self
                .pillow
                .resize(pillow::Filter::Bilinear, &src, w, h, out),
            Recipe::PillowBicubic => self.pillow.resize(pillow::Filter::Bicubic, &src, w, h, out),
            Recipe::FloatBilinear => {
                let mut values = Vec::new();
                self.opencv.linear_f32(&src, w, h, &mut values);
                for (o, v) in out.iter_mut().zip(&values) {
                    *o = v.round_ties_even().clamp(0.0, 255.0) as u8;
                }
            }
        }
    }

    /// Resizes the `crop` of `src` to `out_w` x `out_h` as `float-bilinear` into `out` (packed RGB, `f32`
    /// values on the 0..255 scale).
    pub fn resize_f32(
        &mut self,
        src: &RgbView<'_>,
        crop: Rect,
        out_w: u32,
        out_h: u32,
        out: &mut Vec<f32>,
    ) {
        let src = Source::new(src, crop);
        self.opencv
            .linear_f32(&src, out_w as usize, out_h as usize, out);
    }
}

/// Flags in `mask` (one flag per row of a picture `height` rows high) the rows that a resize of the rows
/// `top..top + crop_h` to `out_h` rows reads, and says whether that leaves any row out. Only a resize that
/// reads few rows says yes: OpenCV's linear recipes read two per output row, so a 1920x1080 frame for a
/// 224x224 input needs 448 of its rows converted. The others read every row of the crop when they shrink
/// (area, Pillow's antialiasing filters) and are not worth the bookkeeping.
pub fn rows_read(
    recipe: Recipe,
    height: u32,
    top: u32,
    crop_h: u32,
    out_h: u32,
    mask: &mut Vec<bool>,
) -> bool {
    mask.clear();
    let (len, start, crop_len, out_len) = (height, top, crop_h, out_h);
    let linear = matches!(recipe, Recipe::OpencvLinear | Recipe::FloatBilinear);
    if !linear || crop_len == 0 || out_len == 0 || start + crop_len > len || crop_len == out_len {
        return false;
    }
    mask.resize(len as usize, false);
    for (a, b) in opencv::linear_samples(crop_len as usize, out_len as usize, false) {
        mask[(start as usize) + a] = true;
        mask[(start as usize) + b] = true;
    }
    mask.iter().any(|read| !read)
}

/// The crop of a packed RGB picture a resize reads.
#[derive(Debug, Clone, Copy)]
struct Source<'a> {
    data: &'a [u8],
    /// Bytes from one row to the next.
    stride: usize,
    /// Offset of the crop's first byte.
    start: usize,
    width: usize,
    height: usize,
}

impl<'a> Source<'a> {
    fn new(view: &RgbView<'a>, (x, y, w, h): Rect) -> Self {
        let stride = view.width as usize * CHANNELS;
        Self {
            data: view.data,
            stride,
            start: y as usize * stride + x as usize * CHANNELS,
            width: w as usize,
            height: h as usize,
        }
    }

    /// Row `r` of the crop.
    fn row(&self, r: usize) -> &'a [u8] {
        let start = self.start + r * self.stride;
        &self.data[start..start + self.width * CHANNELS]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn earlier_names_are_refused_with_the_name_to_use() {
        let text = Recipe::from_name("bilinear").expect_err("an earlier name");
        assert!(
            text.contains("opencv-linear") && text.contains("pillow-bilinear"),
            "{text}"
        );
        let text = Recipe::from_name("area").expect_err("an earlier name");
        assert!(text.contains("opencv-area"), "{text}");
        let text = Recipe::from_name("lanczos").expect_err("unknown");
        assert!(text.contains("pillow-bicubic"), "{text}");
        for recipe in Recipe::ALL {
            assert_eq!(Recipe::from_name(recipe.name()), Ok(recipe));
        }
    }

    fn picture(w: u32, h: u32, seed: u64) -> Vec<u8> {
        crate::vector::noise(seed, (w * h) as usize * CHANNELS)
    }

    /// The same size taken whole is the identity for every 8-bit recipe (as in each library).
    #[test]
    fn same_size_is_the_identity() {
        let data = picture(13, 7, 5);
        let view = RgbView {
            width: 13,
            height: 7,
            data: &data,
        };
        let mut resizer = Resizer::default();
        for recipe in Recipe::ALL {
            let mut out = Vec::new();
            resizer.resize_u8(recipe, &view, (0, 0, 13, 7), 13, 7, &mut out);
            assert_eq!(out, data, "{recipe}");
        }
    }

    /// A flat picture stays flat at any size, for every recipe (the weights of each output sum to one).
    #[test]
    fn a_flat_picture_stays_flat() {
        let data: Vec<u8> = std::iter::repeat_n([200u8, 17, 96], 31 * 9)
            .flatten()
            .collect();
        let view = RgbView {
            width: 31,
            height: 9,
            data: &data,
        };
        let mut resizer = Resizer::default();
        for recipe in Recipe::ALL {
            for (w, h) in [(1, 1), (5, 3), (31, 9), (64, 20), (2, 40)] {
                let mut out = Vec::new();
                resizer.resize_u8(recipe, &view, (3, 1, 20, 7), w, h, &mut out);
                assert!(
                    out.chunks_exact(3).all(|p| p == [200, 17, 96]),
                    "{recipe} {w}x{h}"
                );
            }
        }
    }

    /// The rows `rows_read` leaves out do not change the output.
    #[test]
    fn rows_left_out_are_not_read() {
        let (w, h) = (70u32, 90u32);
        let data = picture(w, h, 9);
        let mut rows = Vec::new();
        let mut sparse_seen = 0;
        for recipe in [Recipe::OpencvLinear, Recipe::FloatBilinear] {
            for (top, crop_h, out_h) in [
                (0, 90, 20),
                (10, 61, 7),
                (5, 80, 80),
                (0, 90, 200),
                (3, 1, 5),
            ] {
                for (left, crop_w, out_w) in [(0, 70, 9), (2, 41, 17), (1, 1, 3), (0, 70, 140)] {
                    sparse_seen += usize::from(rows_read(recipe, h, top, crop_h, out_h, &mut rows));
                    let mut blanked = data.clone();
                    for (y, row) in blanked.chunks_exact_mut(w as usize * 3).enumerate() {
                        if !rows.get(y).is_none_or(|r| *r) {
                            row.fill(0xA5);
                        }
                    }
                    let mut resizer = Resizer::default();
                    let (mut a, mut b) = (Vec::new(), Vec::new());
                    let crop = (left, top, crop_w, crop_h);
                    let view = |d| RgbView {
                        width: w,
                        height: h,
                        data: d,
                    };
                    resizer.resize_u8(recipe, &view(&data), crop, out_w, out_h, &mut a);
                    resizer.resize_u8(recipe, &view(&blanked), crop, out_w, out_h, &mut b);
                    assert_eq!(a, b, "{recipe} {crop:?} -> {out_w}x{out_h}");
                }
            }
        }
        assert!(sparse_seen > 10, "{sparse_seen}");
        assert!(rows_read(
            Recipe::OpencvLinear,
            1080,
            0,
            1080,
            224,
            &mut rows
        ));
        assert_eq!(rows.iter().filter(|r| **r).count(), 448);
        assert!(!rows_read(
            Recipe::PillowBilinear,
            1080,
            0,
            1080,
            224,
            &mut rows
        ));
    }
}
