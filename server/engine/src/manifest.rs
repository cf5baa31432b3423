//! The model manifest: what a model needs, in TOML, beside its `.onnx` file.
//!
//! Unknown keys are refused so that a typo never silently falls back to a default.

use serde::{Deserialize, Serialize};

pub use crate::resize::Recipe;

/// Tensor layout of the model's image input.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Layout {
    /// Batch, channels, height, width.
    Nchw,
    /// Batch, height, width, channels.
    Nhwc,
}

/// Channel order the model expects.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum ColourOrder {
    /// Red, green, blue.
    Rgb,
    /// Blue, green, red.
    Bgr,
}

/// How a region of interest is brought to the model's input size.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ResizeRule {
    /// Scale each axis independently (the aspect ratio may change).
    Stretch,
    /// Cut the largest centred rectangle of the input's aspect ratio, then scale it.
    CentreCrop,
    /// Scale to fit inside the input keeping the aspect ratio, centred on a fill of `letterbox_fill`.
    Letterbox,
}

/// What the model's output holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum OutputKind {
    /// Unnormalised scores: softmax is applied.
    Logits,
    /// Probabilities summing to 1: used as they are.
    Probabilities,
}

/// The `[input]` table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct InputSpec {
    /// Name of the image input tensor in the graph.
    pub tensor: String,
    /// Layout.
    pub layout: Layout,
    /// Width in pixels.
    pub width: u32,
    /// Height in pixels.
    pub height: u32,
    /// Channel order.
    pub colour_order: ColourOrder,
    /// Pixel values (0..255) are multiplied by this before the mean is subtracted.
    pub scale: f64,
    /// Per-channel mean, in the model's channel order.
    pub mean: [f64; 3],
    /// Per-channel standard deviation, in the model's channel order.
    pub std: [f64; 3],
    /// Resize rule.
    pub resize: ResizeRule,
    /// The resize recipe, named after the library whose values it reproduces (`opencv-linear`,
    /// `opencv-area`, `pillow-bilinear`, `pillow-bicubic`, `float-bilinear`; see [`crate::resize`]).
    pub interpolation: Recipe,
    /// Grey level of the letterbox fill (0..255).
    #[serde(default)]
    pub letterbox_fill: u8,
}

/// The `[output]` table.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputSpec {
    /// Name of the class-score output in the graph; empty for the first output.
    #[serde(default)]
    pub tensor: String,
    /// Logits or probabilities.
    pub kind: OutputKind,
}

/// A model manifest.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Manifest {
    /// Model name, unique within a server.
    pub name: String,
    /// Model version.
    pub version: String,
    /// The `.onnx` file, relative to the manifest.
    pub file: String,
    /// Class names in output order.
    pub classes: Vec<String>,
    /// What the model is for, and what not.
    pub intended_use: String,
    /// The model's own caution, shown in addition to framewise's.
    #[serde(default)]
    pub caution: String,
    /// How the model was made (free text).
    #[serde(default)]
    pub trained: String,
    /// The package's reference cases (a TOML file relative to the manifest, see [`crate::cases`]), run at
    /// load on the serving host; empty for none.
    #[serde(default)]
    pub self_test: String,
    /// The input recipe.
    pub input: InputSpec,
    /// The output.
    pub output: OutputSpec,
}

/// A manifest that cannot be used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum ManifestError {
    /// Not TOML, or not of the manifest's shape.
    #[error("manifest is not valid: {0}")]
    Parse(String),
    /// A field has an impossible value.
    #[error("manifest field `{field}` {problem}")]
    Field {
        field: &'static str,
        problem: String,
    },
}

/// Largest input side the engine accepts from a manifest.
pub const MAX_INPUT_SIDE: u32 = 4096;

impl Manifest {
    /// Parses and checks a manifest.
    pub fn parse(text: &str) -> Result<Self, ManifestError> {
        let manifest: Manifest =
            toml::from_str(text).map_err(|e| ManifestError::Parse(e.message().to_string()))?;
        manifest.check()?;
        Ok(manifest)
    }

    fn check(&self) -> Result<(), ManifestError> {
        let bad = |field, problem: String| Err(ManifestError::Field { field, problem });
        if self.name.trim().is_empty() {
            return bad("name", "is empty".into());
        }
        if self.file.trim().is_empty() {
            return bad("file", "is empty".into());
        }
        if self.classes.is_empty() {
            return bad("classes", "lists no class".into());
        }
        if let Some(dup) = self
            .classes
            .iter()
            .enumerate()
            .find(|(i, c)| self.classes[..*i].contains(c))
        {
            return bad("classes", format!("names `{}` twice", dup.1));
        }
        let input = &self.input;
        if input.tensor.is_empty() {
            return bad("input.tensor", "is empty".into());
        }
        for (field, side) in [("input.width", input.width), ("input.height", input.height)] {
            if side == 0 || side > MAX_INPUT_SIDE {
                return bad(field, format!("is {side}; it must be 1..={MAX_INPUT_SIDE}"));
            }
        }
        if !(input.scale.is_finite() && input.scale > 0.0) {
            return bad(
                "input.scale",
                format!("is {}; it must be positive", input.scale),
            );
        }
        if input.mean.iter().any(|m| !m.is_finite()) {
            return bad(
                "input.mean",
                format!("is {:?}; values must be finite", input.mean),
            );
        }
        if input.std.iter().any(|s| !(s.is_finite() && *s > 0.0)) {
            return bad(
                "input.std",
                format!("is {:?}; values must be positive", input.std),
            );
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
name = "m"
version = "1"
file = "m.onnx"
classes = ["a", "b"]
intended_use = "tests"
[input]
tensor = "x"
layout = "nchw"
width = 8
height = 8
colour_order = "rgb"
scale = 0.00392156862745098
mean = [0.0, 0.0, 0.0]
std = [1.0, 1.0, 1.0]
resize = "stretch"
interpolation = "opencv-linear"
[output]
kind = "logits"
"#;

    #[test]
    fn parses_a_good_manifest() {
        let m = Manifest::parse(GOOD).expect("good manifest");
        assert_eq!(m.classes, ["a", "b"]);
        assert_eq!(m.input.resize, ResizeRule::Stretch);
    }

    #[test]
    fn refuses_unknown_keys_and_bad_values() {
        let typo = GOOD.replace("colour_order", "color_order");
        assert!(matches!(
            Manifest::parse(&typo),
            Err(ManifestError::Parse(_))
        ));
        let dup = GOOD.replace(r#"["a", "b"]"#, r#"["a", "a"]"#);
        assert_eq!(
            Manifest::parse(&dup).expect_err("dup").to_string(),
            "manifest field `classes` names `a` twice"
        );
        let zero_std = GOOD.replace("std = [1.0, 1.0, 1.0]", "std = [1.0, 0.0, 1.0]");
        assert!(
            Manifest::parse(&zero_std)
                .expect_err("std")
                .to_string()
                .contains("input.std")
        );
        let old = GOOD.replace("opencv-linear", "bilinear");
        let text = Manifest::parse(&old)
            .expect_err("an earlier name")
            .to_string();
        assert!(
            text.contains("input.interpolation") && text.contains("`opencv-linear`"),
            "{text}"
        );
        let huge = GOOD.replace("width = 8", "width = 100000");
        assert!(
            Manifest::parse(&huge)
                .expect_err("huge")
                .to_string()
                .contains("input.width")
        );
    }
}
