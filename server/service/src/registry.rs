//! The models a server holds, loaded and warmed up before the server reports SERVING.

use std::sync::Arc;

use framewise_engine::{Model, ModelError, ModelPackage, load_model};
use framewise_models_demo::package::demo_package;

use crate::config::ServerConfig;

/// Loaded models by name, the default first.
#[derive(Debug, Clone)]
pub struct ModelRegistry {
    models: Vec<Arc<Model>>,
}

/// A model that did not load.
#[derive(Debug)]
pub struct LoadFailure {
    /// Where it came from.
    pub source: String,
    /// Why it failed.
    pub error: ModelError,
}

impl ModelRegistry {
    /// A registry of already loaded models; the first is the default.
    pub fn new(models: Vec<Arc<Model>>) -> Self {
        Self { models }
    }

    /// Loads the demo model (if configured) and every configured package. Failures are returned beside the
    /// registry (or as the error, with `strict_models`).
    pub fn load(config: &ServerConfig) -> Result<(Self, Vec<LoadFailure>), LoadFailure> {
        let mut models = Vec::new();
        let mut failures = Vec::new();
        for entry in &config.models {
            let source = entry.path.display().to_string();
            let loaded = ModelPackage::read(&entry.path).and_then(|p| {
                load_model(
                    &p,
                    entry.sha256.as_deref(),
                    &config.engine_options(Some(entry)),
                )
            });
            match loaded {
                Ok(model) => models.push(Arc::new(model)),
                Err(error) if config.strict_models => return Err(LoadFailure { source, error }),
                Err(error) => failures.push(LoadFailure { source, error }),
            }
        }
        if config.demo_model {
            let demo =
                demo_package().and_then(|p| load_model(&p, None, &config.engine_options(None)));
            match demo {
                Ok(model) => models.push(Arc::new(model)),
                Err(error) => {
                    return Err(LoadFailure {
                        source: "embedded demo model".into(),
                        error,
                    });
                }
            }
        }
        let mut registry = Self { models };
        if !config.default_model.is_empty() {
            let pos = registry
                .models
                .iter()
                .position(|m| m.identity().name == config.default_model)
                .ok_or_else(|| LoadFailure {
                    source: format!("default_model `{}`", config.default_model),
                    error: ModelError::Engine {
                        engine: "registry",
                        reason: "no loaded model has that name".into(),
                    },
                })?;
            let default = registry.models.remove(pos);
            registry.models.insert(0, default);
        }
        if registry.models.is_empty() {
            let source = "models".to_string();
            let error = ModelError::Engine {
                engine: "registry",
                reason: "no model loaded".into(),
            };
            return Err(failures.pop().unwrap_or(LoadFailure { source, error }));
        }
        Ok((registry, failures))
    }

    /// The model of that name; the default for an empty name.
    pub fn get(&self, name: &str) -> Option<&Arc<Model>> {
        if name.is_empty() {
            self.models.first()
        } else {
            self.models.iter().find(|m| m.identity().name == name)
        }
    }

    /// All models, the default first.
    pub fn all(&self) -> &[Arc<Model>] {
        &self.models
    }
}
