//! `framewise`: the command-line client. Parses arguments and hands over to a command module.
//!
//! Exit codes: 0 done; 1 an error (printed as `framewise: <cause chain>` on stderr); 2 bad usage;
//! 3 a `bench` release gate failed.

use std::io::IsTerminal;
use std::path::PathBuf;
use std::sync::Arc;

use anyhow::{Context, Result};
use clap::{Parser, Subcommand};
use framewise_cli::{bench, client, demo, models, plot, recording, replay, score, settings};

/// framewise: per-class probabilities for every frame of a medical video stream, CPU only.
///
/// Decision support only, not a diagnosis: outputs are probabilities that can be wrong and must be confirmed by a
/// qualified clinician; check local regulations before any clinical use.
#[derive(Parser)]
#[command(name = "framewise", version, propagate_version = true)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Start a server in this process on the embedded demo model, stream a synthetic phantom sweep, show the
    /// live call, then print the summary and write results and plots.
    Demo(demo::DemoArgs),
    /// Send a recording (a folder of PNG/JPEG frames with labels.csv, or a .y4m file) through a server or the
    /// offline engine and write one JSON line per frame.
    Replay(ReplayArgs),
    /// Score a results file against its per-frame labels: raw and smoothed side by side.
    Score(ScoreArgs),
    /// Load a server with concurrent sessions at a set frame rate (open loop) and report throughput and latency
    /// percentiles; --max-p99-ms and --min-fps make it a release gate (exit 3 when it fails).
    Bench(bench::BenchArgs),
    /// List the server's models.
    Models(ModelsArgs),
}

#[derive(clap::Args)]
struct ServerFlags {
    /// Server URL: `http://host:port`, or `unix:PATH` for a server's Unix socket on this
    /// host. `replay` takes several (repeat the flag, or give a host name with several addresses) and moves to
    /// the next when one fails, re-running the recording from its start there.
    #[arg(
        long = "server",
        default_value = "http://127.0.0.1:50051",
        env = "FRAMEWISE_SERVER",
        value_delimiter = ','
    )]
    servers: Vec<String>,
    /// Bearer token for the server.
    #[arg(long, env = "FRAMEWISE_TOKEN", hide_env_values = true)]
    token: Option<String>,
    #[command(flatten)]
    connect: client::ConnectFlags,
}

#[derive(clap::Args)]
struct ReplayArgs {
    /// The recording: a folder of frames (with an optional labels.csv) or a .y4m file.
    recording: PathBuf,
    /// Output JSON Lines file (standard output if not given).
    #[arg(long, short)]
    out: Option<PathBuf>,
    /// Run the engine in this process instead of on a server.
    #[arg(long)]
    offline: bool,
    /// Model package for --offline (default: the embedded demo model).
    #[arg(long, requires = "offline")]
    model: Option<PathBuf>,
    /// Engine for --offline.
    #[command(flatten)]
    engine: settings::EngineFlags,
    /// Pace: the recorded timestamps divided by this factor; 0 sends as fast as answers come back.
    #[arg(long, default_value_t = 0.0)]
    speed: f64,
    /// Continue an interrupted replay: keep the whole lines already in --out and add the missing frames.
    #[arg(long, requires = "out")]
    resume: bool,
    #[command(flatten)]
    server: ServerFlags,
    #[command(flatten)]
    session: settings::SessionFlags,
}

#[derive(clap::Args)]
struct ScoreArgs {
    /// A results file written by `replay` or `demo`.
    results: PathBuf,
    /// Write the report as JSON here too.
    #[arg(long)]
    json: Option<PathBuf>,
    /// Write the probability timeline plot here (.svg or .png).
    #[arg(long)]
    plot: Option<PathBuf>,
    /// Write the reliability diagram here (.svg or .png).
    #[arg(long)]
    reliability: Option<PathBuf>,
    /// Re-run the temporal filters over a grid of parameters on the stored raw probabilities and report the
    /// trade-off between delay and switches.
    #[arg(long)]
    sweep: bool,
    /// Write the sweep's trade-off plot here (.svg or .png).
    #[arg(long, requires = "sweep")]
    sweep_plot: Option<PathBuf>,
    /// Decision thresholds for the sweep: enter, exit, dwell in ms.
    #[arg(long, default_value = "0.6,0.4,500", requires = "sweep")]
    sweep_decision: String,
}

#[derive(clap::Args)]
struct ModelsArgs {
    #[command(flatten)]
    server: ServerFlags,
    /// JSON Lines instead of a table.
    #[arg(long)]
    json: bool,
}

fn main() {
    let cli = Cli::parse();
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
    {
        Ok(r) => r,
        Err(e) => {
            eprintln!("framewise: starting the runtime: {e}");
            std::process::exit(1);
        }
    };
    let result = runtime.block_on(run(cli));
    if let Err(err) = result {
        if is_broken_pipe(&err) {
            std::process::exit(0);
        }
        eprintln!("framewise: {err:#}");
        std::process::exit(1);
    }
}

fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|e| {
        e.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

async fn run(cli: Cli) -> Result<()> {
    match cli.command {
        Command::Demo(args) => demo::run(args).await,
        Command::Replay(args) => replay_command(args).await,
        Command::Score(args) => score_command(args),
        Command::Bench(args) => {
            let json = args.json.is_some();
            let (report, pass) = bench::run(args).await?;
            println!("{}", bench::human(&report));
            if json {
                eprintln!("framewise bench: JSON report written");
            }
            if !pass {
                std::process::exit(3);
            }
            Ok(())
        }
        Command::Models(args) => {
            let server = args.server.servers.first().map_or("", String::as_str);
            models::run(
                server,
                args.server.token.as_deref(),
                &args.server.connect,
                args.json,
            )
            .await
        }
    }
}

async fn replay_command(args: ReplayArgs) -> Result<()> {
    anyhow::ensure!(
        args.speed >= 0.0 && args.speed.is_finite(),
        "--speed must be 0 or a positive factor"
    );
    let recording = recording::Recording::open(&args.recording)?;
    for w in &recording.warnings {
        eprintln!("framewise: warning: {w}");
    }
    let total = recording.frames.len();
    let recording = Arc::new(recording);
    let targets: Vec<replay::Target> = if args.offline {
        vec![replay::Target::Offline {
            model: args.model.clone(),
            engine: args.engine.options(),
        }]
    } else {
        client::expand_endpoints(&args.server.servers)
            .await
            .into_iter()
            .map(|url| replay::Target::Server {
                url,
                token: args.server.token.clone(),
                connect: args.server.connect.clone(),
            })
            .collect()
    };
    anyhow::ensure!(!targets.is_empty(), "give a --server");
    anyhow::ensure!(
        targets.len() == 1 || args.out.is_some(),
        "several servers need --out: after a server fails, the recording is re-run from its start on the next \
         one and its output replaces what was written"
    );
    let pacing = if args.speed > 0.0 {
        replay::Pacing::Speed(args.speed)
    } else {
        replay::Pacing::Fast
    };
    let progress = (std::io::stderr().is_terminal() && args.out.is_some()).then(|| {
        let bar = indicatif::ProgressBar::new(total as u64);
        bar.set_style(
            indicatif::ProgressStyle::with_template(
                "{bar:40} {pos}/{len} frames  {per_sec}  eta {eta}",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        bar
    });
    let mut attempt = 0;
    let tally = loop {
        let target = &targets[attempt];
        let mut unreadable = 0usize;
        // After a failover the recording starts again from its first frame (filter state cannot move
        // between servers) and the output is rewritten, so no frame appears twice.
        let resume = args.resume && attempt == 0;
        let outcome = replay::replay(
            recording.clone(),
            target,
            &args.session,
            pacing,
            args.out.as_deref(),
            resume,
            |r| {
                if let Some(bar) = &progress {
                    bar.inc(1);
                }
                if r.kind == "error" {
                    unreadable += 1;
                    let message = format!(
                        "frame {} ({}): {}",
                        r.seq,
                        r.name,
                        r.error.as_deref().unwrap_or("error")
                    );
                    match &progress {
                        Some(bar) => bar.println(format!("framewise: {message}")),
                        None => eprintln!("framewise: {message}"),
                    }
                }
            },
        )
        .await;
        match outcome {
            Ok(tally) => break tally,
            Err(e) if attempt + 1 < targets.len() && client::is_server_failure(&e) => {
                attempt += 1;
                let next = &targets[attempt];
                eprintln!(
                    "framewise: {} failed: {e:#}; re-running the recording from its start on {}",
                    target.describe(),
                    next.describe()
                );
                if let Some(bar) = &progress {
                    bar.set_position(0);
                }
            }
            Err(e) if client::is_server_failure(&e) && args.out.is_some() => {
                return Err(e.context(
                    "the replay stopped; the whole lines written so far are kept: run the same command with \
                     --resume to answer the remaining frames",
                ));
            }
            Err(e) => return Err(e),
        }
    };
    if let Some(bar) = progress {
        bar.finish_and_clear();
    }
    eprintln!(
        "framewise: {} frames: {} results, {} skipped, {} errors; {} lines written ({} kept from before) in {:.1} s. {}",
        tally.frames,
        tally.results,
        tally.skipped,
        tally.errors,
        tally.written,
        tally.kept,
        tally.elapsed.as_secs_f64(),
        framewise_engine::caution::CAUTION_SHORT
    );
    Ok(())
}

fn score_command(args: ScoreArgs) -> Result<()> {
    for path in [&args.plot, &args.reliability, &args.sweep_plot]
        .into_iter()
        .flatten()
    {
        plot::PlotFormat::of(path)?;
    }
    let (header, records) = score::read_results(&args.results)?;
    let report = score::Report::compute(&records, &header.classes)?;
    println!(
        "model: {} {} (sha256 {}), self-test {}",
        header.model.name,
        header.model.version,
        header.model.sha256,
        header.model.self_test.summary()
    );
    println!("{}", report.human());
    if let Some(path) = &args.json {
        std::fs::write(path, serde_json::to_string_pretty(&report.json(&header))?)
            .with_context(|| format!("writing {}", path.display()))?;
    }
    if let Some(path) = &args.plot {
        plot::timeline(&header, &records, path)?;
    }
    if let Some(path) = &args.reliability {
        plot::reliability(&header, &report, path)?;
    }
    if args.sweep {
        let v: Vec<f64> = args
            .sweep_decision
            .split(',')
            .map(|p| p.trim().parse::<f64>())
            .collect::<Result<_, _>>()
            .context("--sweep-decision: expected ENTER,EXIT,DWELL_MS")?;
        anyhow::ensure!(
            v.len() == 3,
            "--sweep-decision: expected ENTER,EXIT,DWELL_MS"
        );
        let decision = framewise_engine::DecisionSpec {
            enter: v[0],
            exit: v[1],
            dwell_ms: v[2],
        };
        let points = score::sweep(&records, &header.classes, decision)?;
        println!(
            "\nfilter sweep (decision enter {}, exit {}, dwell {} ms)",
            v[0], v[1], v[2]
        );
        println!("{}", score::sweep_human(&points));
        if let Some(path) = &args.sweep_plot {
            plot::sweep(&header, &points, path)?;
        }
    }
    Ok(())
}
