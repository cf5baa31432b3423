//! A model package's reference cases: input images and the probabilities the researcher's own validation
//! pipeline gave for them, which [`crate::selftest`] runs through this host's whole path at load, and what
//! that run showed ([`SelfTestOutcome`], part of every model identity).
//!
//! The cases file (TOML, written by `models-demo/scripts/make_self_test.py`) sits in the package and is named
//! by the manifest's `self_test` key:
//!
//! ```toml
//! made_by = "OpenCV 5.0.0 and onnxruntime 1.32.0 (make_self_test.py)"
//! tolerance = 1e-4
//! [[case]]
//! image = "frame-001.png"                   # relative to the cases file; PNG or JPEG
//! probabilities = [0.91, 0.05, 0.04]
//! [[case]]
//! image = "frame-002.nv12"                  # a raw frame names its format and size
//! format = "nv12"
//! width = 640
//! height = 480
//! probabilities = [0.12, 0.80, 0.08]
//! ```

use std::path::Path;
use std::sync::Arc;

use serde::Deserialize;

use crate::frame::PixelFormat;

/// Most cases a package may carry.
pub const MAX_CASES: usize = 256;
/// Largest case image (64 MiB).
pub const MAX_CASE_BYTES: u64 = 64 << 20;
/// Largest total of all case images (256 MiB): the cases are held in memory for as long as the package.
pub const MAX_CASES_TOTAL_BYTES: u64 = 256 << 20;
/// Largest cases file (1 MiB: thousands of cases' worth of text).
pub const MAX_CASES_FILE_BYTES: u64 = 1 << 20;
/// Largest tolerance accepted: a wider one would prove nothing.
pub const MAX_TOLERANCE: f64 = 0.05;

/// The cases, read and checked.
#[derive(Debug, Clone, PartialEq)]
pub struct SelfTest {
    /// How the expected probabilities were made (free text from the file).
    pub made_by: String,
    /// Largest accepted |probability - expected| for any class of any case.
    pub tolerance: f64,
    /// The cases.
    pub cases: Vec<SelfTestCase>,
}

/// One reference case.
#[derive(Debug, Clone, PartialEq)]
pub struct SelfTestCase {
    /// The image's file name, for messages.
    pub image: String,
    /// Its format.
    pub format: PixelFormat,
    /// Width and height (raw formats; 0 for PNG and JPEG).
    pub size: (u32, u32),
    /// The bytes.
    pub data: Arc<[u8]>,
    /// The probabilities the validation pipeline gave, in class order.
    pub probabilities: Vec<f64>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct CasesFile {
    #[serde(default)]
    made_by: String,
    tolerance: f64,
    #[serde(rename = "case")]
    cases: Vec<CaseEntry>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct CaseEntry {
    image: String,
    #[serde(default)]
    format: Option<String>,
    #[serde(default)]
    width: u32,
    #[serde(default)]
    height: u32,
    probabilities: Vec<f64>,
}

/// A cases file that cannot be used.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("self-test cases {file}: {problem}")]
pub struct CasesError {
    /// The cases file.
    pub file: String,
    /// What is wrong, and where.
    pub problem: String,
}

fn invalid(path: &str, problem: impl Into<String>) -> CasesError {
    CasesError {
        file: path.to_string(),
        problem: problem.into(),
    }
}

impl SelfTest {
    /// Parses a cases file `name` (its text), reading each image with `read` (a name relative to the cases
    /// file, giving its bytes), and checks it against `classes`.
    pub fn parse(
        name: &str,
        text: &str,
        classes: usize,
        mut read: impl FnMut(&str) -> Result<Vec<u8>, String>,
    ) -> Result<Self, CasesError> {
        let file: CasesFile =
            toml::from_str(text).map_err(|e| invalid(name, e.to_string().trim_end()))?;
        if !(file.tolerance.is_finite() && file.tolerance > 0.0 && file.tolerance <= MAX_TOLERANCE)
        {
            return Err(invalid(
                name,
                format!(
                    "tolerance is {}; it must be in (0, {MAX_TOLERANCE}]",
                    file.tolerance
                ),
            ));
        }
        if file.cases.is_empty() || file.cases.len() > MAX_CASES {
            return Err(invalid(
                name,
                format!(
                    "it holds {} cases; 1..={MAX_CASES} are accepted",
                    file.cases.len()
                ),
            ));
        }
        let mut cases = Vec::with_capacity(file.cases.len());
        let mut total = 0u64;
        for (i, case) in file.cases.into_iter().enumerate() {
            let at = |problem: String| {
                invalid(
                    name,
                    format!("case {} (`{}`): {problem}", i + 1, case.image),
                )
            };
            if !is_inside(&case.image) {
                return Err(at(
                    "name the image by a path inside the package, relative to the cases \
                     file (no `..`, not absolute)"
                        .into(),
                ));
            }
            if case.probabilities.len() != classes {
                return Err(at(format!(
                    "{} probabilities for a model of {classes} classes",
                    case.probabilities.len()
                )));
            }
            if case
                .probabilities
                .iter()
                .any(|p| !(p.is_finite() && (0.0..=1.0).contains(p)))
            {
                return Err(at("every probability must be in [0, 1]".into()));
            }
            let format = match &case.format {
                Some(f) => {
                    PixelFormat::from_name(f).ok_or_else(|| at(format!("unknown format `{f}`")))?
                }
                None => match Path::new(&case.image)
                    .extension()
                    .map(|e| e.to_string_lossy().to_ascii_lowercase())
                    .as_deref()
                {
                    Some("png") => PixelFormat::Png,
                    Some("jpg" | "jpeg") => PixelFormat::Jpeg,
                    _ => {
                        return Err(at(
                            "name a `format` (the file is neither .png nor .jpg)".into()
                        ));
                    }
                },
            };
            if !format.is_encoded() && (case.width == 0 || case.height == 0) {
                return Err(at(format!("a {format} frame needs `width` and `height`")));
            }
            let data = read(&case.image).map_err(at)?;
            total += data.len() as u64;
            if total > MAX_CASES_TOTAL_BYTES {
                return Err(at(format!(
                    "the images so far hold {total} bytes, more than the {MAX_CASES_TOTAL_BYTES} all cases may"
                )));
            }
            cases.push(SelfTestCase {
                image: case.image,
                format,
                size: (case.width, case.height),
                data: data.into(),
                probabilities: case.probabilities,
            });
        }
        Ok(Self {
            made_by: file.made_by,
            tolerance: file.tolerance,
            cases,
        })
    }

    /// Reads a cases file (at most [`MAX_CASES_FILE_BYTES`]) from disk, its images beside it (each a regular
    /// file of at most [`MAX_CASE_BYTES`], all together at most [`MAX_CASES_TOTAL_BYTES`]).
    pub fn read(path: &Path, classes: usize) -> Result<Self, CasesError> {
        let shown = path.display().to_string();
        let bytes = read_bounded(path, MAX_CASES_FILE_BYTES).map_err(|e| invalid(&shown, e))?;
        let text = String::from_utf8(bytes).map_err(|_| invalid(&shown, "it is not UTF-8 text"))?;
        let dir = path.parent().unwrap_or(Path::new("."));
        Self::parse(&shown, &text, classes, |image| {
            read_bounded(&dir.join(image), MAX_CASE_BYTES)
        })
    }
}

/// True for a relative path that stays below its starting folder (no `..`, no root, no prefix).
pub fn is_inside(path: &str) -> bool {
    use std::path::Component;
    !path.is_empty()
        && Path::new(path)
            .components()
            .all(|c| matches!(c, Component::Normal(_) | Component::CurDir))
}

/// The bytes of a regular file of at most `limit` bytes, checked before and while reading (a FIFO, a device
/// or a file that grows is refused rather than read without end).
fn read_bounded(path: &Path, limit: u64) -> Result<Vec<u8>, String> {
    use std::io::Read;
    let shown = path.display();
    let meta = std::fs::metadata(path).map_err(|e| format!("cannot read {shown}: {e}"))?;
    if !meta.is_file() || meta.len() > limit {
        return Err(format!(
            "{shown} is not a regular file of at most {limit} bytes"
        ));
    }
    let file = std::fs::File::open(path).map_err(|e| format!("cannot read {shown}: {e}"))?;
    let mut bytes = Vec::with_capacity(meta.len() as usize);
    file.take(limit + 1)
        .read_to_end(&mut bytes)
        .map_err(|e| format!("cannot read {shown}: {e}"))?;
    if bytes.len() as u64 > limit {
        return Err(format!(
            "{shown} grew beyond {limit} bytes while it was read"
        ));
    }
    Ok(bytes)
}

/// What the self-test showed on this host.
#[derive(Debug, Clone, PartialEq)]
pub enum SelfTestOutcome {
    /// The package carries no cases.
    Absent,
    /// The package carries cases, but this load did not run them ([`crate::model::Model::load_with`]
    /// alone; servers and the offline paths load through [`crate::selftest::load`]).
    NotRun,
    /// Every case within the tolerance.
    Passed {
        /// Cases run.
        cases: usize,
        /// Largest |probability - expected| over every class of every case.
        largest_deviation: f64,
        /// The package's tolerance.
        tolerance: f64,
        /// How the expected values were made.
        made_by: String,
    },
    /// At least one case beyond the tolerance, or one that could not be analysed.
    Failed {
        /// Cases run.
        cases: usize,
        /// Cases beyond the tolerance or not analysed.
        failed: usize,
        /// Largest |probability - expected| over the cases analysed.
        largest_deviation: f64,
        /// The package's tolerance.
        tolerance: f64,
        /// How the expected values were made.
        made_by: String,
        /// The first failing case and why.
        first: String,
    },
}

impl SelfTestOutcome {
    /// "passed", "failed" or "none".
    pub fn verdict(&self) -> &'static str {
        match self {
            Self::Absent => "none",
            Self::NotRun => "not run",
            Self::Passed { .. } => "passed",
            Self::Failed { .. } => "failed",
        }
    }

    /// The largest deviation seen (0 without cases).
    pub fn largest_deviation(&self) -> f64 {
        match self {
            Self::Absent | Self::NotRun => 0.0,
            Self::Passed {
                largest_deviation, ..
            }
            | Self::Failed {
                largest_deviation, ..
            } => *largest_deviation,
        }
    }

    /// One line for people: `passed (4 cases, largest deviation 2.1e-7, tolerance 1e-4)`.
    pub fn summary(&self) -> String {
        match self {
            Self::Absent => "none (the package carries no reference cases)".into(),
            Self::NotRun => "not run on this load".into(),
            Self::Passed {
                cases,
                largest_deviation,
                tolerance,
                ..
            } => format!(
                "passed ({cases} cases, largest deviation {largest_deviation:.1e}, tolerance {tolerance:.0e})"
            ),
            Self::Failed {
                cases,
                failed,
                largest_deviation,
                tolerance,
                first,
                ..
            } => format!(
                "FAILED ({failed} of {cases} cases beyond the tolerance {tolerance:.0e}, largest deviation \
                 {largest_deviation:.1e}; first: {first})"
            ),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
made_by = "tests"
tolerance = 1e-4
[[case]]
image = "a.png"
probabilities = [0.25, 0.75]
[[case]]
image = "b.raw"
format = "nv12"
width = 4
height = 2
probabilities = [1.0, 0.0]
"#;

    fn parse(text: &str) -> Result<SelfTest, CasesError> {
        SelfTest::parse("cases.toml", text, 2, |name| Ok(name.as_bytes().to_vec()))
    }

    #[test]
    fn parses_cases_and_names_what_is_wrong() {
        let test = parse(GOOD).expect("good cases");
        assert_eq!(test.cases.len(), 2);
        assert_eq!(test.cases[0].format, PixelFormat::Png);
        assert_eq!(
            (test.cases[1].format, test.cases[1].size),
            (PixelFormat::Nv12, (4, 2))
        );
        for (bad, says) in [
            (GOOD.replace("1e-4", "0.5"), "tolerance"),
            (
                GOOD.replace("[0.25, 0.75]", "[0.25]"),
                "case 1 (`a.png`): 1 probabilities",
            ),
            (GOOD.replace("[0.25, 0.75]", "[1.25, 0.75]"), "[0, 1]"),
            (
                GOOD.replace("format = \"nv12\"\n", ""),
                "neither .png nor .jpg",
            ),
            (
                GOOD.replace("width = 4\n", ""),
                "needs `width` and `height`",
            ),
            (GOOD.replace("made_by", "made_with"), "cases.toml"),
            (
                GOOD.replace("\"a.png\"", "\"../a.png\""),
                "inside the package",
            ),
            (
                GOOD.replace("\"a.png\"", "\"/etc/a.png\""),
                "inside the package",
            ),
        ] {
            let text = parse(&bad).expect_err(says).to_string();
            assert!(text.contains(says), "{text}");
        }
        let missing = SelfTest::parse("cases.toml", GOOD, 2, |_| Err("no such file".into()));
        assert!(
            missing
                .expect_err("missing")
                .to_string()
                .contains("no such file")
        );
    }
}
