//! The binary's cluster and object storage commands (`run --stage --part`,
//! `merge`, `submit`, `publish`, `pull`): argument checks and printing only;
//! the work is in [`actuary::cluster`] and [`actuary::storage`].

use std::path::Path;

use anyhow::{Context, Result, bail};

use actuary::cluster::{self, MergeOutcome, PartOutcome, SubmitOptions};
use actuary::runner::Stage;
use actuary::spec::Spec;

fn stage_arg(name: &str) -> Result<Stage> {
    let stage = Stage::parse(name).with_context(|| {
        format!("unknown stage `{name}` (allowed: decode, align, fit, label, shard)")
    })?;
    if !cluster::is_partitioned(stage) {
        bail!("the {stage} stage does not run in parts (only decode and label do)");
    }
    Ok(stage)
}

/// `actuary run SPEC --stage STAGE --part K/N`.
pub fn run_part(spec: &Path, stage: &str, part: &str, threads: usize) -> Result<i32> {
    let stage = stage_arg(stage)?;
    let part = cluster::parse_part(part)?;
    let spec = Spec::load(spec)?;
    let what = format!("{stage} part {}/{}", part.index, part.count);
    match cluster::run_part(&spec, stage, part, threads)? {
        PartOutcome::Done => println!(
            "{what}: done ({})",
            cluster::parts::part_path(&spec.out, stage, part).display()
        ),
        PartOutcome::AlreadyDone => println!("{what}: already done, skipped"),
        PartOutcome::AlreadyMerged => {
            println!("{what}: the stage is already merged, skipped");
            return Ok(0);
        }
    }
    // The last part to finish merges the stage; the merge job then only
    // finds it merged. A failed merge here does not fail the part: the merge
    // job (or `actuary merge`) reports it.
    match cluster::merge_if_complete(&spec, stage, part.count, threads) {
        Ok(Some(MergeOutcome::Merged)) => println!(
            "{stage}: all {} part(s) done, merged into {}",
            part.count,
            actuary::store::StageManifest::path(&spec.out, stage.name()).display()
        ),
        Ok(Some(MergeOutcome::AlreadyMerged)) | Ok(None) => {}
        Err(e) => eprintln!(
            "warning: {stage}: all parts are done but merging them here failed \
             (the merge job or `actuary merge` will report it): {e}"
        ),
    }
    Ok(0)
}

/// `actuary merge SPEC --stage STAGE --parts N`.
pub fn merge(spec: &Path, stage: &str, parts: Option<u32>, threads: usize) -> Result<i32> {
    let stage = stage_arg(stage)?;
    let spec = Spec::load(spec)?;
    let n = parts.unwrap_or(spec.cluster.parts);
    match cluster::merge(&spec, stage, n, threads)? {
        MergeOutcome::Merged => println!(
            "{stage}: merged {n} part(s) into {}",
            actuary::store::StageManifest::path(&spec.out, stage.name()).display()
        ),
        MergeOutcome::AlreadyMerged => println!("{stage}: already merged, skipped"),
    }
    Ok(0)
}

/// `actuary submit SPEC [--parts N] [--until STAGE] [--dry-run]`.
pub fn submit(
    spec: &Path,
    parts: Option<u32>,
    until: Option<&str>,
    dry_run: bool,
    threads: usize,
) -> Result<i32> {
    let until = match until {
        None => Stage::Shard,
        Some(name) => Stage::parse(name).with_context(|| {
            format!(
                "unknown stage `{name}` for --until (allowed: decode, align, fit, label, shard)"
            )
        })?,
    };
    let spec = Spec::load(spec)?;
    let parts = parts.unwrap_or(spec.cluster.parts);
    if parts == 0 {
        bail!("--parts must be at least 1");
    }
    let program = match &spec.cluster.program {
        Some(p) => p.into(),
        None => std::env::current_exe().context("cannot find the running actuary program")?,
    };
    let opts = SubmitOptions {
        parts,
        until,
        dry_run,
        program,
        threads,
    };
    let report = cluster::submit(&spec, &opts)?;
    if dry_run {
        for j in &report.jobs {
            println!("==> {}", j.script.display());
            print!("{}", j.text);
        }
    }
    print!("{}", report.render(&spec.out));
    Ok(0)
}

/// `actuary publish SPEC [--to URL]`.
pub fn publish(spec: &Path, to: Option<&str>) -> Result<i32> {
    let spec = Spec::load(spec)?;
    let Some(url) = to
        .map(str::to_string)
        .or_else(|| spec.cluster.publish.clone())
    else {
        bail!("no destination: pass --to URL or set `publish` in the spec's [cluster] table");
    };
    let dir = spec.out.join("shard");
    if !actuary::store::StageManifest::path(&spec.out, "shard").is_file() {
        bail!(
            "{}: no shard manifest (run the shard stage first)",
            dir.display()
        );
    }
    let report = actuary::storage::publish(&dir, &url, &spec.cluster.store)?;
    if report.already {
        println!(
            "{}: already published with the same files, nothing uploaded",
            report.url
        );
    } else {
        println!(
            "{}: published {} file(s), {} bytes, commit marker {}",
            report.url,
            report.uploaded,
            report.bytes,
            actuary::storage::COMMIT_MARKER
        );
    }
    Ok(0)
}

/// `actuary pull URL DIR`.
pub fn pull(url: &str, dir: &Path, endpoint: Option<String>, allow_http: bool) -> Result<i32> {
    let mut opts = actuary::spec::ClusterOptions::default().store;
    opts.endpoint = endpoint;
    opts.allow_http = allow_http;
    let marker = actuary::storage::pull(url, dir, &opts)?;
    let bytes: u64 = marker.files.iter().map(|f| f.bytes).sum();
    println!(
        "pulled {} file(s), {bytes} bytes, every sha256 checked, into {}",
        marker.files.len(),
        dir.display()
    );
    Ok(0)
}
