//! The self-test a model package may carry, run at load on the host that will serve: every reference case
//! through the whole path (decode, the manifest's preprocessing, inference), its probabilities against the
//! ones the validation pipeline gave. [`load`] is how servers and the offline paths load a model.

use crate::cases::{SelfTest, SelfTestOutcome};
use crate::engine::EngineOptions;
use crate::frame::FrameRef;
use crate::model::{Model, ModelError, ModelPackage};
use crate::pipeline::{self, FrameSpec, Scratch};

/// Loads and prepares a package ([`Model::load_with`]), then runs its self-test, if it carries one, and
/// records the outcome in the model's identity. A model that fails it is refused, unless
/// `options.serve_failed_self_test` asks for it to be served marked as failing.
pub fn load(
    package: &ModelPackage,
    pinned_sha256: Option<&str>,
    options: &EngineOptions,
) -> Result<Model, ModelError> {
    let mut model = Model::load_with(package, pinned_sha256, options)?;
    // Without cases the identity already says so (`Model::load_with`).
    let Some(test) = &package.self_test else {
        return Ok(model);
    };
    let outcome = run(&model, test);
    if matches!(outcome, SelfTestOutcome::Failed { .. }) && !options.serve_failed_self_test {
        return Err(ModelError::SelfTestFailed {
            model: model.identity().name.clone(),
            engine: model.identity().engine,
            summary: outcome.summary(),
        });
    }
    model.set_self_test(outcome);
    Ok(model)
}

/// Runs every case through the whole path (decode, the manifest's preprocessing, inference) on `model`.
pub fn run(model: &Model, test: &SelfTest) -> SelfTestOutcome {
    let mut scratch = Scratch::default();
    let spec = FrameSpec::default();
    let (mut worst, mut failed, mut first) = (0.0f64, 0usize, None);
    for case in &test.cases {
        let frame = FrameRef {
            format: case.format,
            width: case.size.0,
            height: case.size.1,
            stride: 0,
            data: &case.data,
        };
        let problem = match pipeline::analyse(model, &frame, &spec, &mut scratch) {
            Ok(analysed) if analysed.raw.iter().any(|p| !p.is_finite()) => Some(format!(
                "`{}` gave probabilities that are not numbers: {:?}",
                case.image, analysed.raw
            )),
            Ok(analysed) => {
                let deviation = analysed
                    .raw
                    .iter()
                    .zip(&case.probabilities)
                    .map(|(p, e)| (f64::from(*p) - e).abs())
                    .fold(0.0, f64::max);
                worst = worst.max(deviation);
                (deviation > test.tolerance)
                    .then(|| format!("`{}` deviates by {deviation:.1e}", case.image))
            }
            Err(e) => Some(format!("`{}` could not be analysed: {e}", case.image)),
        };
        if let Some(problem) = problem {
            failed += 1;
            first.get_or_insert(problem);
        }
    }
    match first {
        None => SelfTestOutcome::Passed {
            cases: test.cases.len(),
            largest_deviation: worst,
            tolerance: test.tolerance,
            made_by: test.made_by.clone(),
        },
        Some(first) => SelfTestOutcome::Failed {
            cases: test.cases.len(),
            failed,
            largest_deviation: worst,
            tolerance: test.tolerance,
            made_by: test.made_by.clone(),
            first,
        },
    }
}
