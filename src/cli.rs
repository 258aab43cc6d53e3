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
        /// With --part: run only this partitioned stage (decode or label) for
        /// one part; the stages before it must be done.
        #[arg(
            long,
            value_name = "STAGE",
            requires = "part",
            conflicts_with = "until"
        )]
        stage: Option<String>,
        /// With --stage: run part K of N (0-based, e.g. 2/8). The part writes
        /// its clips' outputs and RUN/STAGE/parts/K-of-N.json instead of the
        /// stage manifest; `actuary merge` folds the parts together.
        #[arg(long, value_name = "K/N", requires = "stage")]
        part: Option<String>,
    },
    /// Fold the parts of a partitioned stage (decode or label) into its stage
    /// manifest; refuses when a part is missing or was made from other
    /// settings or inputs.
    Merge {
        /// The pipeline spec (TOML).
        spec: PathBuf,
        /// The partitioned stage: decode or label.
        #[arg(long, value_name = "STAGE")]
        stage: String,
        /// Number of parts N [default: the spec's `cluster.parts`, 4 if unset].
        #[arg(long, value_name = "N")]
        parts: Option<u32>,
        /// Worker threads [default: number of CPUs].
        #[arg(short = 'j', long = "jobs")]
        jobs: Option<usize>,
    },
    /// Write Slurm batch scripts for a spec into RUN/cluster/ and submit them
    /// with sbatch: a job array per partitioned stage (decode, label), single
    /// jobs for merges, align + fit, shard and publish, chained with
    /// afterok dependencies. Finished stages and parts get no job, so running
    /// it again after a failure resubmits only what is left. RUN must be on
    /// a filesystem shared by every node.
    Submit {
        /// The pipeline spec (TOML).
        spec: PathBuf,
        /// Number of parts N [default: the spec's `cluster.parts`, 4 if unset].
        #[arg(long, value_name = "N")]
        parts: Option<u32>,
        /// Last stage to run, inclusive [default: shard].
        #[arg(long, value_name = "STAGE")]
        until: Option<String>,
        /// Write and print the scripts without submitting them.
        #[arg(long)]
        dry_run: bool,
        /// Threads used here to fingerprint the inputs [default: number of CPUs].
        #[arg(short = 'j', long = "jobs")]
        jobs: Option<usize>,
    },
    /// Upload the shards and their manifest to object storage (multipart
    /// puts), then a commit marker written last with a conditional create.
    Publish {
        /// The pipeline spec (TOML).
        spec: PathBuf,
        /// Destination URL (s3://BUCKET/PREFIX, gs://, az://, file:///PATH)
        /// [default: the spec's `cluster.publish`].
        #[arg(long, value_name = "URL")]
        to: Option<String>,
    },
    /// Download a published dataset into DIR, checking every file against its
    /// commit marker; a dataset without a commit marker is refused.
    Pull {
        /// The dataset URL.
        url: String,
        /// Output folder, created when missing.
        dir: PathBuf,
        /// S3-compatible endpoint [default: $AWS_ENDPOINT or the provider's].
        #[arg(long, value_name = "URL")]
        endpoint: Option<String>,
        /// Allow a plain http:// endpoint.
        #[arg(long)]
        allow_http: bool,
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
        /// Number of further robot clips in robot-check/, for a held-out set
        /// (calibration and evaluation only) [default: the committed demo's].
        #[arg(long)]
        check_clips: Option<usize>,
        /// Width and height of the clips in pixels, even, 32 to 1024
        /// [default: the committed demo's, 96].
        #[arg(long)]
        size: Option<u32>,
    },
}
