//! The `actuary` binary: parse the command line, call the library, print the
//! cause chain of any error and map it to an exit code.

use std::process::ExitCode;

use anyhow::{Context, Result, bail};
use clap::Parser;

use actuary::cli::{Cli, Command};
use actuary::error::{CAUTION, EXIT_FAILURE};
use actuary::runner::{self, RunOptions, Stage};
use actuary::spec::Spec;

mod cluster_cmd;

fn main() -> ExitCode {
    let cli = Cli::parse();
    bound_candle_threads(&cli.command);
    raise_open_file_limit();
    match dispatch(cli.command) {
        Ok(code) => ExitCode::from(code as u8),
        Err(err) => {
            if is_broken_pipe(&err) {
                return ExitCode::SUCCESS;
            }
            eprintln!("error: {err}");
            for cause in err.chain().skip(1) {
                eprintln!("  caused by: {cause}");
            }
            if is_too_many_open_files(&err) {
                eprintln!(
                    "hint: align, fit, label and shard keep one file open per clip; this process \
                     may open {} files (`ulimit -Hn`); raise that limit above the number of clips",
                    open_file_limit().map_or("an unknown number of".into(), |n| n.to_string())
                );
            }
            ExitCode::from(EXIT_FAILURE as u8)
        }
    }
}

/// The stages after decode keep one file open per clip (frame stores are read
/// with positioned reads), so a run of more than about a thousand clips needs
/// more than the usual soft limit of 1024 open files. Raise the soft limit to
/// the hard one at start-up, as some language runtimes do; a failure leaves
/// the limit as it was.
fn raise_open_file_limit() {
    #[cfg(unix)]
    {
        let mut limit = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        // SAFETY: getrlimit and setrlimit only read and write the struct passed.
        unsafe {
            if libc::getrlimit(libc::RLIMIT_NOFILE, &mut limit) == 0
                && limit.rlim_cur < limit.rlim_max
            {
                limit.rlim_cur = limit.rlim_max;
                let _ = libc::setrlimit(libc::RLIMIT_NOFILE, &limit);
            }
        }
    }
}

/// This process's soft limit on open files.
fn open_file_limit() -> Option<u64> {
    #[cfg(unix)]
    {
        let mut limit = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        // SAFETY: getrlimit only writes the struct passed.
        if unsafe { libc::getrlimit(libc::RLIMIT_NOFILE, &mut limit) } == 0 {
            return Some(limit.rlim_cur);
        }
    }
    None
}

fn is_too_many_open_files(err: &anyhow::Error) -> bool {
    err.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|e| e.raw_os_error() == Some(libc::EMFILE))
    })
}

/// candle sizes its element-wise worker pool from `CANDLE_NUM_THREADS` (or the
/// physical core count) when first used; set it from `-j` before any thread
/// starts so `-j N` bounds every stage, the model included.
fn bound_candle_threads(command: &Command) {
    let jobs = match command {
        Command::Run { jobs, .. } | Command::Merge { jobs, .. } | Command::Submit { jobs, .. } => {
            *jobs
        }
        _ => None,
    };
    if std::env::var_os("CANDLE_NUM_THREADS").is_none() {
        let n = default_jobs(jobs);
        // SAFETY: called first thing in main, before any other thread exists.
        unsafe { std::env::set_var("CANDLE_NUM_THREADS", n.to_string()) };
    }
}

fn is_broken_pipe(err: &anyhow::Error) -> bool {
    err.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|e| e.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

fn default_jobs(jobs: Option<usize>) -> usize {
    jobs.unwrap_or_else(|| std::thread::available_parallelism().map_or(1, |n| n.get()))
        .max(1)
}

fn dispatch(command: Command) -> Result<i32> {
    match command {
        Command::Check { spec, json, jobs } => {
            let spec = Spec::load(&spec)?;
            let report = actuary::check::check_inputs(&spec, default_jobs(jobs));
            if json {
                println!("{}", serde_json::to_string_pretty(&report)?);
            } else {
                for (set, n) in &report.clips {
                    println!("set {set}: {n} clip(s)");
                }
                println!("sidecars parsed: {}", report.sidecars);
                for p in &report.problems {
                    println!("problem: {}: {}", p.path.display(), p.message);
                }
                if report.ok() {
                    println!("ok: spec and inputs are valid");
                } else {
                    println!("{} problem(s) found", report.problems.len());
                }
            }
            Ok(if report.ok() { 0 } else { EXIT_FAILURE })
        }
        Command::Run {
            spec,
            stage: Some(stage),
            part: Some(part),
            jobs,
            ..
        } => cluster_cmd::run_part(&spec, &stage, &part, default_jobs(jobs)),
        Command::Merge {
            spec,
            stage,
            parts,
            jobs,
        } => cluster_cmd::merge(&spec, &stage, parts, default_jobs(jobs)),
        Command::Submit {
            spec,
            parts,
            until,
            dry_run,
            jobs,
        } => cluster_cmd::submit(&spec, parts, until.as_deref(), dry_run, default_jobs(jobs)),
        Command::Publish { spec, to } => cluster_cmd::publish(&spec, to.as_deref()),
        Command::Pull {
            url,
            dir,
            endpoint,
            allow_http,
        } => cluster_cmd::pull(&url, &dir, endpoint, allow_http),
        Command::Run {
            spec, until, jobs, ..
        } => {
            let until = match until {
                None => Stage::Shard,
                Some(name) => match Stage::parse(&name) {
                    Some(s) => s,
                    None => bail!(
                        "unknown stage `{name}` for --until (allowed: decode, align, fit, label, shard)"
                    ),
                },
            };
            let spec = Spec::load(&spec)?;
            let opts = RunOptions {
                until,
                threads: default_jobs(jobs),
            };
            runner::run(&spec, &opts)?;
            if until >= Stage::Label {
                for note in actuary::label::motion_range_notes(&spec.out) {
                    eprintln!("{note}");
                }
            }
            let last = runner::stage_dir(&spec.out, until);
            if until == Stage::Shard {
                println!("shards: {}", last.display());
            } else {
                println!("stopped after {until}: outputs in {}", last.display());
            }
            println!("{CAUTION}");
            Ok(0)
        }
        Command::Inspect {
            run,
            stage,
            json,
            verify,
        } => {
            let stage = match stage.as_deref() {
                None => None,
                Some(name) => Some(Stage::parse(name).with_context(|| {
                    format!("unknown stage `{name}` (allowed: decode, align, fit, label, shard)")
                })?),
            };
            let text = actuary::report::inspect(&run, stage, json, verify)?;
            print!("{text}");
            Ok(0)
        }
        Command::ExportFrames {
            run,
            clip,
            dir,
            set,
        } => {
            let n = actuary::export::export_frames(&run, &clip, set.as_deref(), &dir)?;
            println!("wrote {n} frame(s) to {}", dir.display());
            Ok(0)
        }
        Command::Report { run, output } => {
            let out = output.unwrap_or_else(|| run.join("report.html"));
            actuary::report::write_report(&run, &out)?;
            println!("report: {}", out.display());
            Ok(0)
        }
        Command::DemoClips {
            dir,
            seed,
            robot_clips,
            human_clips,
            check_clips,
            size,
        } => {
            let mut opts = actuary::demo::DemoOptions::default();
            if let Some(s) = seed {
                opts.seed = s;
            }
            if let Some(n) = robot_clips {
                opts.robot_clips = n;
            }
            if let Some(n) = human_clips {
                opts.human_clips = n;
            }
            if let Some(n) = check_clips {
                opts.check_clips = n;
            }
            if let Some(px) = size {
                opts.size = px;
            }
            let summary = actuary::demo::generate(&dir, &opts)?;
            println!(
                "wrote {} robot, {} held-out robot and {} human clip(s) to {} ({} bytes)",
                summary.robot_clips,
                summary.check_clips,
                summary.human_clips,
                dir.display(),
                summary.bytes
            );
            Ok(0)
        }
    }
}
