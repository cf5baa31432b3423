//! The manifest's recipe from packed RGB to the model's input tensor: crop for the resize rule, resize with
//! the named recipe (each one a library's arithmetic, see [`crate::resize`]), normalise, and lay out as NCHW
//! or NHWC. 8-bit recipes normalise through a table of the 256 values; `float-bilinear` normalises each
//! `f32` value, so nothing is rounded before the tensor.

use crate::frame::{RgbImage, RgbView};
use crate::manifest::{ColourOrder, InputSpec, Layout, ResizeRule};
use crate::resize::{self, Resizer};
use crate::vector::with_avx2;

/// Where the resized picture sits inside the model's input (the whole input except for letterbox).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Placement {
    /// Left offset in the input.
    pub x: u32,
    /// Top offset in the input.
    pub y: u32,
    /// Width of the picture.
    pub width: u32,
    /// Height of the picture.
    pub height: u32,
}

/// The source rectangle (within the region of interest) and where it lands in the model's input.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct ResizePlan {
    /// Source crop: x, y, width, height.
    pub crop: (u32, u32, u32, u32),
    /// Destination placement.
    pub place: Placement,
}

/// Computes the crop and placement for a `width` x `height` region under the manifest's resize rule.
///
/// Centre crop: the largest centred rectangle with the input's aspect ratio, its size rounded to whole
/// pixels and its offset rounded down. Letterbox: scale by min(W/w, H/h), round the scaled size to whole
/// pixels (at least 1), centre it with the offset rounded down.
pub fn plan_resize(spec: &InputSpec, width: u32, height: u32) -> ResizePlan {
    let (tw, th) = (u64::from(spec.width), u64::from(spec.height));
    let (w, h) = (u64::from(width), u64::from(height));
    let whole = Placement {
        x: 0,
        y: 0,
        width: spec.width,
        height: spec.height,
    };
    match spec.resize {
        ResizeRule::Stretch => ResizePlan {
            crop: (0, 0, width, height),
            place: whole,
        },
        ResizeRule::CentreCrop => {
            let (cw, ch) = if w * th > h * tw {
                (((h * tw + th / 2) / th).clamp(1, w), h)
            } else {
                (w, ((w * th + tw / 2) / tw).clamp(1, h))
            };
            let crop = (
                ((w - cw) / 2) as u32,
                ((h - ch) / 2) as u32,
                cw as u32,
                ch as u32,
            );
            ResizePlan { crop, place: whole }
        }
        ResizeRule::Letterbox => {
            let (pw, ph) = if w * th > h * tw {
                (tw, ((h * tw + w / 2) / w).clamp(1, th))
            } else {
                (((w * th + h / 2) / h).clamp(1, tw), th)
            };
            let place = Placement {
                x: ((tw - pw) / 2) as u32,
                y: ((th - ph) / 2) as u32,
                width: pw as u32,
                height: ph as u32,
            };
            ResizePlan {
                crop: (0, 0, width, height),
                place,
            }
        }
    }
}

/// Per-session resizing state and buffers.
#[derive(Debug, Default)]
pub struct Preprocessor {
    resizer: Resizer,
    resized: Vec<u8>,
    resized_f32: Vec<f32>,
    luma: Vec<u8>,
}

/// The prepared input of one frame.
#[derive(Debug, Clone, Copy)]
pub struct Prepared<'a> {
    /// The resized RGB picture (placement size), before normalisation; `float-bilinear`'s rounded to
    /// nearest (its tensor is made from the unrounded values).
    pub picture: &'a [u8],
    /// Its luma (BT.601 weights, fixed point as OpenCV), for the quality measures.
    pub luma: &'a [u8],
    /// Width and height of `picture`.
    pub size: (u32, u32),
}

impl Preprocessor {
    /// A preprocessor with empty buffers.
    pub fn new() -> Self {
        Self::default()
    }

    /// Resizes `rgb` as the manifest says and writes the normalised tensor into `tensor` (resized to the
    /// model's input length). Returns the resized picture and its luma.
    pub fn prepare<'a>(
        &'a mut self,
        spec: &InputSpec,
        rgb: &'a RgbImage,
        tensor: &mut Vec<f32>,
    ) -> Prepared<'a> {
        self.prepare_view(spec, rgb.view(), tensor)
    }

    /// As [`Preprocessor::prepare`], from borrowed pixels.
    pub fn prepare_view<'a>(
        &'a mut self,
        spec: &InputSpec,
        rgb: RgbView<'a>,
        tensor: &mut Vec<f32>,
    ) -> Prepared<'a> {
        let plan = plan_resize(spec, rgb.width, rgb.height);
        let (pw, ph) = (plan.place.width, plan.place.height);
        // A picture that already has the placement's size and is taken whole is read where it lies (every
        // recipe's resize to the same size is the identity).
        let whole = plan.crop == (0, 0, pw, ph) && (rgb.width, rgb.height) == (pw, ph);
        let recipe = spec.interpolation;
        let picture: &'a [u8] = match rgb.data.get(..pw as usize * ph as usize * 3) {
            Some(data) if whole => data,
            _ if recipe.is_float() => {
                self.resizer
                    .resize_f32(&rgb, plan.crop, pw, ph, &mut self.resized_f32);
                normalise_f32(spec, &plan.place, &self.resized_f32, tensor);
                self.resized.clear();
                self.resized.extend(
                    self.resized_f32
                        .iter()
                        .map(|v| v.round_ties_even().clamp(0.0, 255.0) as u8),
                );
                luma_of(&self.resized, &mut self.luma);
                return Prepared {
                    picture: &self.resized,
                    luma: &self.luma,
                    size: (pw, ph),
                };
            }
            _ => {
                self.resizer
                    .resize_u8(recipe, &rgb, plan.crop, pw, ph, &mut self.resized);
                &self.resized
            }
        };
        normalise(spec, &plan.place, picture, tensor);
        luma_of(picture, &mut self.luma);
        Prepared {
            picture,
            luma: &self.luma,
            size: (pw, ph),
        }
    }
}

/// Flags in `rows` (one per row of a `width` x `height` region) the rows the manifest's resize reads, and
/// says whether that leaves any out; a raw frame then converts only those ([`crate::frame::Needed`]).
pub fn rows_read(spec: &InputSpec, width: u32, height: u32, rows: &mut Vec<bool>) -> bool {
    let plan = plan_resize(spec, width, height);
    let (_, y, _, h) = plan.crop;
    resize::rows_read(spec.interpolation, height, y, h, plan.place.height, rows)
}

with_avx2! {
/// Writes `(v * scale - mean[c]) / std[c]` into the tensor in the manifest's layout and channel order,
/// with the letterbox fill around the placed picture.
fn normalise / normalise_plain(spec: &InputSpec, place: &Placement, picture: &[u8], tensor: &mut Vec<f32>) {
    let (tw, th) = (spec.width as usize, spec.height as usize);
    // Every value is written below (fill, then picture), so the buffer is not cleared first.
    tensor.resize(3 * tw * th, 0.0);
    // Per channel (in the model's order): the source channel in RGB, and a lookup table for 0..=255.
    let source = match spec.colour_order {
        ColourOrder::Rgb => [0usize, 1, 2],
        ColourOrder::Bgr => [2usize, 1, 0],
    };
    let mut tables = [[0f32; 256]; 3];
    for (c, table) in tables.iter_mut().enumerate() {
        for (v, slot) in table.iter_mut().enumerate() {
            *slot = ((v as f64 * spec.scale - spec.mean[c]) / spec.std[c]) as f32;
        }
    }
    let (px, py, pw, ph) = (
        place.x as usize,
        place.y as usize,
        place.width as usize,
        place.height as usize,
    );
    // The letterbox fill first (only where the picture does not cover the tensor), then the picture row by
    // row: a table lookup per value, with no per-value bounds test.
    let covered = px == 0 && py == 0 && pw == tw && ph == th;
    let fill = spec.letterbox_fill as usize;
    match spec.layout {
        Layout::Nchw => {
            let (p0, rest) = tensor.split_at_mut(tw * th);
            let (p1, p2) = rest.split_at_mut(tw * th);
            if !covered {
                for (plane, table) in [&mut *p0, &mut *p1, &mut *p2].into_iter().zip(&tables) {
                    plane.fill(table[fill]);
                }
            }
            // One pass over the picture, each pixel read once and written to the three planes.
            let [t0, t1, t2] = &tables;
            let [s0, s1, s2] = source;
            for y in 0..ph {
                let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                let at = (py + y) * tw + px;
                let (d0, d1, d2) = (
                    &mut p0[at..at + pw],
                    &mut p1[at..at + pw],
                    &mut p2[at..at + pw],
                );
                for (((p, a), b), c) in src.chunks_exact(3).zip(d0).zip(d1).zip(d2) {
                    *a = t0[p[s0] as usize];
                    *b = t1[p[s1] as usize];
                    *c = t2[p[s2] as usize];
                }
            }
        }
        Layout::Nhwc => {
            if !covered {
                for px3 in tensor.chunks_exact_mut(3) {
                    for c in 0..3 {
                        px3[c] = tables[c][fill];
                    }
                }
            }
            for y in 0..ph {
                let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                let start = ((py + y) * tw + px) * 3;
                let dst = &mut tensor[start..start + pw * 3];
                for (d, p) in dst.chunks_exact_mut(3).zip(src.chunks_exact(3)) {
                    for c in 0..3 {
                        d[c] = tables[c][p[source[c]] as usize];
                    }
                }
            }
        }
    }
}
}

/// As [`normalise`], from `f32` values (`float-bilinear`): `(v * scale - mean[c]) / std[c]` computed for
/// each value in `f64`, as the 8-bit path's table is, rounded to `f32` once.
fn normalise_f32(spec: &InputSpec, place: &Placement, picture: &[f32], tensor: &mut Vec<f32>) {
    let (tw, th) = (spec.width as usize, spec.height as usize);
    tensor.resize(3 * tw * th, 0.0);
    let source = match spec.colour_order {
        ColourOrder::Rgb => [0usize, 1, 2],
        ColourOrder::Bgr => [2usize, 1, 0],
    };
    let value = |c: usize, v: f64| ((v * spec.scale - spec.mean[c]) / spec.std[c]) as f32;
    let fill = [0, 1, 2].map(|c| value(c, f64::from(spec.letterbox_fill)));
    let (px, py, pw, ph) = (
        place.x as usize,
        place.y as usize,
        place.width as usize,
        place.height as usize,
    );
    let covered = px == 0 && py == 0 && pw == tw && ph == th;
    match spec.layout {
        Layout::Nchw => {
            if !covered {
                for (c, plane) in tensor.chunks_exact_mut(tw * th).enumerate() {
                    plane.fill(fill[c]);
                }
            }
            for (c, plane) in tensor.chunks_exact_mut(tw * th).enumerate() {
                for y in 0..ph {
                    let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                    let dst = &mut plane[(py + y) * tw + px..(py + y) * tw + px + pw];
                    for (d, p) in dst.iter_mut().zip(src.chunks_exact(3)) {
                        *d = value(c, f64::from(p[source[c]]));
                    }
                }
            }
        }
        Layout::Nhwc => {
            if !covered {
                for px3 in tensor.chunks_exact_mut(3) {
                    px3.copy_from_slice(&fill);
                }
            }
            for y in 0..ph {
                let src = &picture[y * pw * 3..(y + 1) * pw * 3];
                let start = ((py + y) * tw + px) * 3;
                for (d, p) in tensor[start..start + pw * 3]
                    .chunks_exact_mut(3)
                    .zip(src.chunks_exact(3))
                {
                    for c in 0..3 {
                        d[c] = value(c, f64::from(p[source[c]]));
                    }
                }
            }
        }
    }
}

with_avx2! {
/// Luma of packed RGB with the BT.601 weights 0.299, 0.587, 0.114 in 15-bit fixed point, as OpenCV 5's
/// `cv2.cvtColor(..., COLOR_RGB2GRAY)` computes them: `(9798 R + 19235 G + 3735 B + 16384) >> 15`.
pub fn luma_of / luma_of_plain(rgb: &[u8], out: &mut Vec<u8>) {
    out.clear();
    out.extend(rgb.chunks_exact(3).map(|p| {
        ((9798 * u32::from(p[0]) + 19235 * u32::from(p[1]) + 3735 * u32::from(p[2]) + 16384) >> 15)
            as u8
    }));
}
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::resize::Recipe;

    fn spec(rule: ResizeRule, w: u32, h: u32) -> InputSpec {
        InputSpec {
            tensor: "x".into(),
            layout: Layout::Nchw,
            width: w,
            height: h,
            colour_order: ColourOrder::Rgb,
            scale: 1.0 / 255.0,
            mean: [0.0; 3],
            std: [1.0; 3],
            resize: rule,
            interpolation: Recipe::OpencvLinear,
            letterbox_fill: 0,
        }
    }

    #[test]
    fn centre_crop_takes_the_largest_centred_square() {
        let plan = plan_resize(&spec(ResizeRule::CentreCrop, 96, 96), 640, 480);
        assert_eq!(plan.crop, (80, 0, 480, 480));
        let plan = plan_resize(&spec(ResizeRule::CentreCrop, 96, 96), 480, 641);
        assert_eq!(plan.crop, (0, 80, 480, 480));
    }

    #[test]
    fn letterbox_fits_and_centres() {
        let plan = plan_resize(&spec(ResizeRule::Letterbox, 224, 224), 1920, 1080);
        assert_eq!(
            plan.place,
            Placement {
                x: 0,
                y: 49,
                width: 224,
                height: 126
            }
        );
        let plan = plan_resize(&spec(ResizeRule::Letterbox, 224, 224), 1, 1000);
        assert_eq!(plan.place.width, 1);
    }

    #[test]
    fn normalise_writes_layout_order_and_fill() {
        let mut s = spec(ResizeRule::Letterbox, 2, 1);
        s.letterbox_fill = 255;
        s.colour_order = ColourOrder::Bgr;
        let place = Placement {
            x: 1,
            y: 0,
            width: 1,
            height: 1,
        };
        let mut t = Vec::new();
        normalise(&s, &place, &[0, 51, 102], &mut t);
        // NCHW with B first: [B(fill), B(pic)], [G(fill), G(pic)], [R(fill), R(pic)]
        assert_eq!(t, vec![1.0, 0.4, 1.0, 0.2, 1.0, 0.0]);
        s.layout = Layout::Nhwc;
        normalise(&s, &place, &[0, 51, 102], &mut t);
        assert_eq!(t, vec![1.0, 1.0, 1.0, 0.4, 0.2, 0.0]);
    }

    /// The AVX2 copy and the baseline copy of normalisation and luma give the same bits (see `vector`), in
    /// both layouts and colour orders, covered and letterboxed.
    #[test]
    fn same_bits_with_and_without_avx2() {
        for (i, (tw, th, pw, ph, x, y)) in [
            (224u32, 224u32, 224u32, 224u32, 0u32, 0u32),
            (96, 96, 96, 60, 0, 18),
            (31, 17, 20, 17, 5, 0),
        ]
        .into_iter()
        .enumerate()
        {
            let picture = crate::vector::noise(i as u64 + 3, (pw * ph * 3) as usize);
            let place = Placement {
                x,
                y,
                width: pw,
                height: ph,
            };
            for layout in [Layout::Nchw, Layout::Nhwc] {
                for order in [ColourOrder::Rgb, ColourOrder::Bgr] {
                    let mut s = spec(ResizeRule::Letterbox, tw, th);
                    s.layout = layout;
                    s.colour_order = order;
                    s.mean = [0.485, 0.456, 0.406];
                    s.std = [0.229, 0.224, 0.225];
                    s.letterbox_fill = 114;
                    let (mut a, mut b) = (vec![7.0f32; 5], Vec::new());
                    normalise(&s, &place, &picture, &mut a);
                    normalise_plain(&s, &place, &picture, &mut b);
                    let bits = |t: &[f32]| t.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(&a), bits(&b), "{tw}x{th} {layout:?} {order:?}");
                }
            }
            let (mut a, mut b) = (Vec::new(), Vec::new());
            luma_of(&picture, &mut a);
            luma_of_plain(&picture, &mut b);
            assert_eq!(a, b);
        }
    }

    /// Converting only the rows `rows_read` flags gives the tensor exactly what the whole conversion gives,
    /// whatever the rows left out hold (here a fixed garbage value, as after another frame), for every raw
    /// format, recipe, rule and region.
    #[test]
    fn converting_only_the_rows_read_changes_nothing() {
        use crate::frame::{self, DecodeScratch, FrameRef, Needed, PixelFormat, Region};
        let mut noise = crate::vector::Noise::new(0x2545_f491_4f6c_dd1d);
        let mut specs = vec![
            spec(ResizeRule::Stretch, 224, 224),
            spec(ResizeRule::CentreCrop, 96, 96),
            spec(ResizeRule::Letterbox, 224, 224),
            spec(ResizeRule::Stretch, 300, 200),
        ];
        for recipe in [
            Recipe::OpencvArea,
            Recipe::FloatBilinear,
            Recipe::PillowBilinear,
        ] {
            let mut s = spec(ResizeRule::CentreCrop, 64, 48);
            s.interpolation = recipe;
            specs.push(s);
        }
        let mut sparse_seen = 0;
        for (w, h) in [
            (1920u32, 1080u32),
            (640, 480),
            (322, 242),
            (226, 224),
            (100, 60),
        ] {
            for format in PixelFormat::ALL.into_iter().filter(|f| !f.is_encoded()) {
                let rgb = noise.bytes((w * h * 3) as usize);
                let data = frame::encode_from_rgb(&rgb, w, h, format).expect("encodes");
                let frame = FrameRef {
                    format,
                    width: w,
                    height: h,
                    stride: 0,
                    data: &data,
                };
                let regions = [
                    None,
                    Some(Region {
                        x: 2,
                        y: 4,
                        width: w / 2,
                        height: h / 2,
                    }),
                    Some(Region {
                        x: 3,
                        y: 5,
                        width: w / 2 + 1,
                        height: h / 2 + 1,
                    }),
                ];
                for s in &specs {
                    for region in regions {
                        let size = region.map_or((w, h), |r| (r.width, r.height));
                        let mut rows = Vec::new();
                        let sparse = rows_read(s, size.0, size.1, &mut rows);
                        let needed = Needed::rows(sparse.then_some(rows.as_slice()));
                        sparse_seen += usize::from(sparse);
                        let limits = &frame::DEFAULT_FRAME_LIMITS;
                        let mut scratch = DecodeScratch::default();
                        let mut whole = RgbImage::default();
                        frame::to_rgb(
                            &frame,
                            region,
                            Default::default(),
                            limits,
                            &mut scratch,
                            &mut whole,
                        )
                        .expect("converts");
                        let mut part = RgbImage {
                            width: size.0,
                            height: size.1,
                            data: vec![0xA5; whole.data.len()],
                        };
                        let view = frame::read_rgb(
                            &frame,
                            region,
                            Default::default(),
                            limits,
                            &mut scratch,
                            &mut part,
                            &needed,
                        )
                        .expect("converts");
                        let (mut a, mut b) = (Vec::new(), Vec::new());
                        Preprocessor::new().prepare(s, &whole, &mut a);
                        Preprocessor::new().prepare_view(s, view, &mut b);
                        assert!(
                            a == b,
                            "{format} {w}x{h} {region:?} {:?} {} {}x{}: the resize read a pixel left out",
                            s.resize,
                            s.interpolation,
                            s.width,
                            s.height
                        );
                    }
                }
            }
        }
        assert!(sparse_seen > 60, "only {sparse_seen} cases left rows out");
    }

    #[test]
    fn luma_uses_the_bt601_weights() {
        let mut out = Vec::new();
        luma_of(&[255, 255, 255, 255, 0, 0, 0, 255, 0, 0, 0, 255], &mut out);
        // 0.299 R + 0.587 G + 0.114 B (ITU-R BT.601 luma weights)
        assert_eq!(out, vec![255, 76, 150, 29]);
    }
}
