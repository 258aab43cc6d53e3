//! Command-line definitions (clap only; no logic).

use std::path::PathBuf;

use clap::{Parser, Subcommand};

/// actuary: turn robot clips with recorded actions and human clips without them
/// into Parquet shards where every frame carries an inferred action, a discrete
/// action code and a calibrated confidence.
///
/// Inferred actions are estimates: validate any policy trained on them in
/// simulation, then on hardware with speed and force limits and an emergency
/// stop, under your lab's safety rules. Video of people is personal data.
#[derive(Debug, Parser)]
#[command(name = "actuary", version, about, long_about)]
pub struct Cli {
    /// What to do.
    #[command(subcommand)]
    pub command: Command,
}

/// The commands.
#[derive(Debug, Subcommand)]
pub enum Command {
    /// Validate a spec and every input it names (probe each clip, parse each
    /// sidecar); list every problem at once and exit 1 if there is any.
    Check {
        /// The pipeline spec (TOML).
        spec: PathBuf,
        /// Print the report as JSON.
        #[arg(long)]
        json: bool,
        /// Worker threads for probing [default: number of CPUs].
        #[arg(short = 'j', long = "jobs")]
        jobs: Option<usize>,
    },
    /// Run the stages of a spec in order (decode, align, fit, label, shard),
    /// skipping those whose settings and inputs are unchanged and resuming an
    /// interrupted stage where it stopped.
    Run {
        /// The pipeline spec (TOML).
        spec: PathBuf,
        /// Last stage to run, inclusive: decode, align, fit, label or shard [default: shard].
        #[arg(long, value_name = "STAGE")]
        until: Option<String>,
        /// Worker threads for every stage [default: number of CPUs].
        #[arg(short = 'j', long = "jobs")]
        jobs: Option<usize>,
    },
    /// Print what the stages of a run produced.
    Inspect {
        /// The run folder (the spec's `out`).
        run: PathBuf,
        /// One stage only: decode, align, fit, label or shard [default: all that exist].
        stage: Option<String>,
        /// Print JSON instead of tables.
        #[arg(long)]
        json: bool,
        /// Re-hash every shard and compare with the manifest (shard stage).
        #[arg(long)]
        verify: bool,
    },
    /// Write a decoded clip's frames as DIR/000000.png, 000001.png, ...
    ExportFrames {
        /// The run folder.
        run: PathBuf,
        /// The clip id (e.g. `robot-03`, `day2/pick-03`).
        clip: String,
        /// Output folder, created when missing.
        dir: PathBuf,
        /// The clip set, needed only when two sets share the clip id.
        #[arg(long, value_name = "NAME")]
        set: Option<String>,
    },
    /// Write a self-contained HTML report of a run.
    Report {
        /// The run folder.
        run: PathBuf,
        /// Output file [default: RUN/report.html].
        #[arg(short = 'o', long = "output")]
        output: Option<PathBuf>,
    },
    /// Regenerate the synthetic tabletop demo clip sets into DIR (robot/,
    /// human/, human-truth/), deterministically from the seed.
    DemoClips {
        /// Output folder.
        dir: PathBuf,
        /// Seed [default: the committed demo's seed].
        #[arg(long)]
        seed: Option<u64>,
        /// Number of robot clips [default: the committed demo's].
        #[arg(long)]
        robot_clips: Option<usize>,
        /// Number of human clips [default: the committed demo's].
        #[arg(long)]
        human_clips: Option<usize>,
    },
}
