//! Slurm job scripts for a spec: one job array per partitioned stage (one
//! task per part), one job for each merge, one for each run of
//! non-partitioned stages (align + fit, shard) and one for publishing,
//! chained with `--dependency=afterok:JOBID` and `--kill-on-invalid-dep=yes`.
//!
//! Scripts are written to `RUN/cluster/` without dependencies inside them, so
//! that any of them can be resubmitted by hand (`sbatch --array=K
//! RUN/cluster/1-decode.sbatch`). Work already done is left out of a new
//! submission: a stage whose manifest has the current key gets no job, and a
//! partitioned stage gets array tasks only for its unfinished parts.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde::Serialize;

use super::parts::{chain, fingerprinted, part_done};
use super::{ClusterError, io_err, is_partitioned};
use crate::runner::{Partition, Stage};
use crate::spec::Spec;
use crate::spec::cluster::JobResources;
use crate::store::{StageManifest, write_atomic, write_json_atomic};

/// Options of one submission.
#[derive(Debug, Clone)]
pub struct SubmitOptions {
    /// Parts of each partitioned stage.
    pub parts: u32,
    /// Last stage (inclusive).
    pub until: Stage,
    /// Write and print the scripts without submitting.
    pub dry_run: bool,
    /// The `actuary` program the jobs run.
    pub program: PathBuf,
    /// Threads used here to fingerprint the inputs.
    pub threads: usize,
}

/// One job of a plan.
#[derive(Debug, Clone, Serialize)]
pub struct JobPlan {
    /// Short name (`decode`, `merge-decode`, `align-fit`, ...).
    pub name: String,
    /// The script.
    pub script: PathBuf,
    /// Array indices (parts still to do), for array jobs.
    pub array: Option<Vec<u32>>,
    /// The script's text.
    pub text: String,
    /// Slurm job id once submitted.
    pub job_id: Option<String>,
}

/// What `submit` did.
#[derive(Debug, Clone, Serialize)]
pub struct SubmitReport {
    /// `RUN/cluster/`.
    pub dir: PathBuf,
    /// Jobs in submission order (dependencies follow this order).
    pub jobs: Vec<JobPlan>,
    /// True when nothing was submitted.
    pub dry_run: bool,
}

/// Quotes `s` for a POSIX shell.
fn sh_quote(s: &str) -> String {
    if !s.is_empty()
        && s.chars()
            .all(|c| c.is_ascii_alphanumeric() || "/._-=:,+@".contains(c))
    {
        s.to_string()
    } else {
        format!("'{}'", s.replace('\'', r"'\''"))
    }
}

/// Compresses sorted indices into Slurm's array syntax (`0-3,5,7-8`).
pub fn array_spec(indices: &[u32]) -> String {
    let mut out = Vec::new();
    let mut i = 0;
    while i < indices.len() {
        let start = indices[i];
        let mut end = start;
        while i + 1 < indices.len() && indices[i + 1] == end + 1 {
            i += 1;
            end = indices[i];
        }
        out.push(if start == end {
            start.to_string()
        } else {
            format!("{start}-{end}")
        });
        i += 1;
    }
    out.join(",")
}

fn header(name: &str, r: &JobResources, log: &Path, array: Option<&[u32]>) -> String {
    let mut t = String::from("#!/bin/bash\n");
    t += &format!("#SBATCH --job-name=actuary-{name}\n");
    if let Some(a) = array {
        t += &format!("#SBATCH --array={}\n", array_spec(a));
    }
    t += &format!("#SBATCH --cpus-per-task={}\n", r.cpus_per_task);
    t += &format!("#SBATCH --mem={}\n", r.mem);
    t += &format!("#SBATCH --time={}\n", r.time);
    if let Some(p) = &r.partition {
        t += &format!("#SBATCH --partition={p}\n");
    }
    t += &format!("#SBATCH --output={}\n", log.display());
    for line in &r.extra {
        t += &format!("#SBATCH {line}\n");
    }
    t += "set -euo pipefail\n";
    t
}

/// Plans the jobs for `spec` (what is already done gets no job).
pub fn plan(spec: &Spec, opts: &SubmitOptions) -> Result<Vec<JobPlan>, ClusterError> {
    let clips = fingerprinted(spec, opts.threads)?;
    let keys = chain(spec, &clips);
    let dir = spec.out.join("cluster");
    let logs = dir.join("logs");
    let program = sh_quote(&opts.program.to_string_lossy());
    let spec_path = sh_quote(&spec.path.to_string_lossy());
    let n = opts.parts.max(1);
    let done = |stage: Stage| {
        StageManifest::read(&spec.out, stage.name())
            .ok()
            .flatten()
            .is_some_and(|m| m.key == keys[&stage].1)
    };
    let mut jobs = Vec::new();
    let mut pending: Vec<Stage> = Vec::new();
    let cpus = |r: &JobResources| format!("-j \"${{SLURM_CPUS_PER_TASK:-{}}}\"", r.cpus_per_task);
    let flush = |pending: &mut Vec<Stage>, jobs: &mut Vec<JobPlan>| {
        let Some(last) = pending.last().copied() else {
            return;
        };
        let name: String = pending
            .iter()
            .map(|s| s.name())
            .collect::<Vec<_>>()
            .join("-");
        // Resources of the heaviest stage in the group: its last one's table, else default.
        let r = pending
            .iter()
            .rev()
            .map(|s| spec.cluster.jobs.get(s.name()))
            .find(|r| r.is_some())
            .flatten()
            .cloned()
            .unwrap_or_else(|| spec.cluster.job(last.name()));
        let script = dir.join(format!("{}-{name}.sbatch", jobs.len() + 1));
        let mut text = header(&name, &r, &logs.join(format!("{name}-%j.out")), None);
        text += &format!(
            "exec {program} run {spec_path} --until {last} {}\n",
            cpus(&r)
        );
        jobs.push(JobPlan {
            name,
            script,
            array: None,
            text,
            job_id: None,
        });
        pending.clear();
    };
    for stage in Stage::ALL.into_iter().filter(|s| *s <= opts.until) {
        if done(stage) {
            continue;
        }
        if !is_partitioned(stage) {
            pending.push(stage);
            continue;
        }
        flush(&mut pending, &mut jobs);
        let key = &keys[&stage].1;
        let todo: Vec<u32> = (0..n)
            .filter(|&index| !part_done(&spec.out, stage, Partition { index, count: n }, key))
            .collect();
        if !todo.is_empty() {
            let r = spec.cluster.job(stage.name());
            let script = dir.join(format!("{}-{stage}.sbatch", jobs.len() + 1));
            let all: Vec<u32> = (0..n).collect();
            let mut text = header(
                stage.name(),
                &r,
                &logs.join(format!("{stage}-%A_%a.out")),
                Some(&all),
            );
            text += &format!(
                "exec {program} run {spec_path} --stage {stage} --part \"${{SLURM_ARRAY_TASK_ID}}/{n}\" {}\n",
                cpus(&r)
            );
            jobs.push(JobPlan {
                name: stage.name().to_string(),
                script,
                array: Some(todo),
                text,
                job_id: None,
            });
        }
        let r = spec.cluster.job("merge");
        let name = format!("merge-{stage}");
        let script = dir.join(format!("{}-{name}.sbatch", jobs.len() + 1));
        let mut text = header(&name, &r, &logs.join(format!("{name}-%j.out")), None);
        text += &format!(
            "exec {program} merge {spec_path} --stage {stage} --parts {n} {}\n",
            cpus(&r)
        );
        jobs.push(JobPlan {
            name,
            script,
            array: None,
            text,
            job_id: None,
        });
    }
    flush(&mut pending, &mut jobs);
    if opts.until == Stage::Shard && spec.cluster.publish.is_some() {
        let r = spec.cluster.job("publish");
        let script = dir.join(format!("{}-publish.sbatch", jobs.len() + 1));
        let mut text = header("publish", &r, &logs.join("publish-%j.out"), None);
        text += &format!("exec {program} publish {spec_path}\n");
        jobs.push(JobPlan {
            name: "publish".into(),
            script,
            array: None,
            text,
            job_id: None,
        });
    }
    Ok(jobs)
}

/// Writes the scripts into `RUN/cluster/` and (unless a dry run) submits them
/// in order, each depending on the one before.
pub fn submit(spec: &Spec, opts: &SubmitOptions) -> Result<SubmitReport, ClusterError> {
    let dir = spec.out.join("cluster");
    let logs = dir.join("logs");
    std::fs::create_dir_all(&logs).map_err(io_err(&logs))?;
    let mut jobs = plan(spec, opts)?;
    for job in &jobs {
        write_atomic(&job.script, job.text.as_bytes()).map_err(io_err(&job.script))?;
    }
    if !opts.dry_run {
        let mut previous: Option<String> = None;
        for job in &mut jobs {
            let mut cmd = Command::new("sbatch");
            cmd.arg("--parsable");
            if let Some(a) = &job.array {
                cmd.arg(format!("--array={}", array_spec(a)));
            }
            if let Some(p) = &previous {
                cmd.arg(format!("--dependency=afterok:{p}"))
                    .arg("--kill-on-invalid-dep=yes");
            }
            cmd.arg(&job.script);
            let out = cmd.output().map_err(|e| ClusterError::Sbatch {
                script: job.script.clone(),
                reason: format!("cannot run sbatch: {e}"),
            })?;
            if !out.status.success() {
                return Err(ClusterError::Sbatch {
                    script: job.script.clone(),
                    reason: String::from_utf8_lossy(&out.stderr).trim().to_string(),
                });
            }
            let text = String::from_utf8_lossy(&out.stdout);
            let id = text.trim().split(';').next().unwrap_or("").to_string();
            if id.is_empty() || !id.chars().all(|c| c.is_ascii_digit()) {
                return Err(ClusterError::Sbatch {
                    script: job.script.clone(),
                    reason: format!("unexpected sbatch output `{}`", text.trim()),
                });
            }
            job.job_id = Some(id.clone());
            previous = Some(id);
        }
    }
    let report = SubmitReport {
        dir: dir.clone(),
        jobs,
        dry_run: opts.dry_run,
    };
    let path = dir.join(if opts.dry_run {
        "plan.json"
    } else {
        "jobs.json"
    });
    write_json_atomic(&path, &report).map_err(io_err(&path))?;
    Ok(report)
}

impl SubmitReport {
    /// A human-readable summary: job ids, and how to follow, rerun and collect.
    pub fn render(&self, run_dir: &Path) -> String {
        let mut t = String::new();
        if self.jobs.is_empty() {
            t += "nothing to submit: every stage up to the requested one is done\n";
            return t;
        }
        for j in &self.jobs {
            let array = j
                .array
                .as_ref()
                .map(|a| format!(" (array {})", array_spec(a)))
                .unwrap_or_default();
            match &j.job_id {
                Some(id) => {
                    t += &format!("{:<16} job {id}{array}  {}\n", j.name, j.script.display())
                }
                None => {
                    t += &format!(
                        "{:<16} not submitted{array}  {}\n",
                        j.name,
                        j.script.display()
                    )
                }
            }
        }
        if self.dry_run {
            t += "dry run: scripts written, nothing submitted (submit them in the order above, each with\n";
            t += "  --dependency=afterok:<previous job id> --kill-on-invalid-dep=yes)\n";
            return t;
        }
        let ids: Vec<&str> = self
            .jobs
            .iter()
            .filter_map(|j| j.job_id.as_deref())
            .collect();
        t += &format!("follow:   squeue -j {}\n", ids.join(","));
        t += &format!(
            "history:  sacct -j {} --format=JobID,JobName,State,Elapsed,ExitCode  (needs Slurm accounting)\n",
            ids.join(",")
        );
        t += &format!("logs:     {}\n", self.dir.join("logs").display());
        if let Some(j) = self.jobs.iter().find(|j| j.array.is_some()) {
            t += &format!(
                "rerun:    a failed part K alone: sbatch --array=K {}; or run `actuary submit` again (finished parts are skipped)\n",
                j.script.display()
            );
        }
        t += &format!("collect:  actuary inspect {}\n", run_dir.display());
        t
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn array_syntax_compresses_runs() {
        assert_eq!(array_spec(&[0, 1, 2, 3]), "0-3");
        assert_eq!(array_spec(&[2]), "2");
        assert_eq!(array_spec(&[0, 1, 3, 5, 6]), "0-1,3,5-6");
    }

    #[test]
    fn quoting_is_shell_safe() {
        assert_eq!(sh_quote("/a/b.toml"), "/a/b.toml");
        assert_eq!(sh_quote("/a b/it's"), r"'/a b/it'\''s'");
    }
}
