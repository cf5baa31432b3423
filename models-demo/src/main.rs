//! `framewise-synth`: writes seeded synthetic recordings of the invented phantom scenario.
use std::path::PathBuf;

use anyhow::Result;
use clap::{Parser, Subcommand};
use framewise_models_demo::recording::{Recording, RecordingKind};

/// Writes seeded synthetic recordings (PNG frames and labels.csv) of an invented bench-top phantom.
/// Demo data only: no patient data; framewise outputs are decision support only, not a diagnosis.
#[derive(Parser)]
#[command(version)]
struct Args {
    #[command(subcommand)]
    kind: Kind,
    /// Output folder.
    #[arg(long, global = true, default_value = "out/synthetic")]
    out: PathBuf,
    /// Seed; the same seed gives the same frames.
    #[arg(long, global = true, default_value_t = 1)]
    seed: u64,
    /// Frame width in pixels.
    #[arg(long, global = true, default_value_t = 640)]
    width: u32,
    /// Frame height in pixels.
    #[arg(long, global = true, default_value_t = 480)]
    height: u32,
}

#[derive(Subcommand)]
enum Kind {
    /// Independent random views balanced over the classes (a training set).
    Views {
        /// Number of frames.
        #[arg(long, default_value_t = 400)]
        count: usize,
    },
    /// A camera sweep with per-frame labels (a recording to replay).
    Sweep {
        /// Duration in seconds.
        #[arg(long, default_value_t = 20.0)]
        seconds: f64,
        /// Frame rate.
        #[arg(long, default_value_t = 30.0)]
        fps: f64,
    },
}

fn main() {
    if let Err(err) = run() {
        eprintln!("framewise-synth: {err:#}");
        std::process::exit(1);
    }
}

fn run() -> Result<()> {
    let args = Args::parse();
    anyhow::ensure!(
        args.width >= 16 && args.height >= 16,
        "frames must be at least 16x16 pixels"
    );
    let kind = match args.kind {
        Kind::Views { count } => RecordingKind::Views { count },
        Kind::Sweep { seconds, fps } => {
            anyhow::ensure!(
                seconds > 0.0 && fps > 0.0,
                "--seconds and --fps must be positive"
            );
            RecordingKind::Sweep { seconds, fps }
        }
    };
    let recording = Recording::plan(kind, args.seed, args.width, args.height);
    let total = recording.len();
    recording.write(&args.out, |done| {
        if done % 100 == 0 || done == total {
            eprint!("\rframewise-synth: {done}/{total} frames");
        }
    })?;
    eprintln!();
    println!("{total} frames written to {}", args.out.display());
    Ok(())
}
