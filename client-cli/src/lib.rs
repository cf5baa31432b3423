//! The framewise command-line client as a library: the binary `framewise` only parses arguments.
//!
//! # Layout
//! - [`client`]: a gRPC session with a server; [`settings`]: session flags to the wire's opening.
//! - [`recording`] and [`y4m`]: recordings to replay; [`replay`]: the streaming core (server or offline).
//! - [`score`]: reports of outputs against labels; [`bench`]: open-loop load; [`demo`]: the one-command demo.
//! - [`output`] and [`plot`]: JSON Lines, tables and SVG plots, each with the caution.

pub mod bench;
pub mod client;
pub mod demo;
pub mod models;
pub mod output;
pub mod plot;
pub mod recording;
pub mod replay;
pub mod score;
pub mod settings;
pub mod y4m;
