//! framewise's workspace integration tests, in one binary with topical modules.
//!
//! The reference checks compare against fixtures made by `tests/reference/make_fixtures.py` from
//! onnxruntime, OpenCV, SciPy and NumPy; the helper in `framewise_tests` makes them on first use.

mod cli;
mod commands;
mod models;
mod reference;
mod server;
mod tls;
