//! `[cluster]` keys: how the map stages are split into parts, the Slurm
//! resources of each job, node-local scratch for clips fetched from object
//! storage, and where the finished shards are published. Resolved into
//! [`ClusterOptions`]. None of these keys changes what a stage produces, so
//! none of them enters a stage key.
//!
//! ```toml
//! [cluster]
//! parts = 8                          # parts of each partitioned stage
//! scratch = "/local/scratch"         # node-local folder for fetched clips
//! scratch-limit-gb = 20              # at most this much fetched at once
//! publish = "s3://bucket/datasets/tabletop"
//!
//! [cluster.store]                    # object store connection (no credentials here)
//! endpoint = "http://127.0.0.1:9000"
//! allow-http = true
//!
//! [cluster.jobs.default]             # every job
//! cpus-per-task = 4
//! mem = "8G"
//! time = "02:00:00"
//! partition = "cpu"
//! extra = ["--account=lab"]
//!
//! [cluster.jobs.fit]                 # one stage (decode, align, fit, label, shard, merge, publish)
//! cpus-per-task = 16
//! ```

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};
use toml::Spanned;

use super::error::Problems;

/// Default number of parts of each partitioned stage.
pub const DEFAULT_PARTS: u32 = 4;
/// Default most bytes of fetched clips on node-local scratch at once, in GB (10^9 bytes).
pub const DEFAULT_SCRATCH_LIMIT_GB: f64 = 20.0;
/// Default size of one part of a multipart upload, MB (10^6 bytes).
pub const DEFAULT_PART_SIZE_MB: f64 = 16.0;
/// Default CPUs per task.
pub const DEFAULT_CPUS_PER_TASK: u32 = 4;
/// Default memory per job (Slurm syntax).
pub const DEFAULT_MEM: &str = "8G";
/// Default time limit per job (Slurm syntax).
pub const DEFAULT_TIME: &str = "04:00:00";
/// The job names that may have their own resources under `[cluster.jobs]`.
pub const JOB_KINDS: &[&str] = &[
    "default", "decode", "align", "fit", "label", "shard", "merge", "publish",
];

/// `[cluster]` as written in the spec.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawCluster {
    /// Parts of each partitioned stage.
    #[serde(default)]
    pub parts: Option<Spanned<i64>>,
    /// Node-local scratch folder (absolute), default: `$SLURM_TMPDIR`, `$TMPDIR` or `/tmp`.
    #[serde(default)]
    pub scratch: Option<Spanned<String>>,
    /// Most GB of fetched clips on scratch at once.
    #[serde(default)]
    pub scratch_limit_gb: Option<Spanned<f64>>,
    /// Object store URL the finished shards are uploaded to.
    #[serde(default)]
    pub publish: Option<Spanned<String>>,
    /// The `actuary` program the jobs run, default: the one that submits.
    #[serde(default)]
    pub program: Option<Spanned<String>>,
    /// Object store connection.
    #[serde(default)]
    pub store: RawStore,
    /// Slurm resources by job name.
    #[serde(default)]
    pub jobs: BTreeMap<String, Spanned<RawJob>>,
}

/// `[cluster.store]`.
#[derive(Debug, Deserialize, Default)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawStore {
    /// Endpoint URL of an S3-compatible service.
    #[serde(default)]
    pub endpoint: Option<String>,
    /// Region.
    #[serde(default)]
    pub region: Option<String>,
    /// Allow plain `http://` endpoints.
    #[serde(default)]
    pub allow_http: Option<bool>,
    /// Virtual-hosted-style S3 requests instead of path-style.
    #[serde(default)]
    pub virtual_hosted: Option<bool>,
    /// Part size of multipart uploads, MB.
    #[serde(default)]
    pub part_size_mb: Option<Spanned<f64>>,
}

/// `[cluster.jobs.NAME]`.
#[derive(Debug, Deserialize, Default, Clone)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct RawJob {
    /// `--cpus-per-task`.
    #[serde(default)]
    pub cpus_per_task: Option<i64>,
    /// `--mem`, e.g. `"8G"`.
    #[serde(default)]
    pub mem: Option<String>,
    /// `--time`, e.g. `"02:00:00"` or `"1-00:00:00"`.
    #[serde(default)]
    pub time: Option<String>,
    /// `--partition` (the Slurm queue).
    #[serde(default)]
    pub partition: Option<String>,
    /// Further `#SBATCH` options, each written as one line.
    #[serde(default)]
    pub extra: Option<Vec<String>>,
}

/// Object store connection settings (credentials come from the environment only).
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct StoreOptions {
    /// Endpoint URL of an S3-compatible service (else `AWS_ENDPOINT` or the provider's).
    pub endpoint: Option<String>,
    /// Region (else `AWS_REGION` / `AWS_DEFAULT_REGION`).
    pub region: Option<String>,
    /// Allow plain `http://` endpoints (else `AWS_ALLOW_HTTP`).
    pub allow_http: bool,
    /// Virtual-hosted-style S3 requests (default path-style when an endpoint is given).
    pub virtual_hosted: bool,
    /// Multipart upload part size in bytes.
    pub part_size: usize,
}

/// Slurm resources of one job.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct JobResources {
    /// `--cpus-per-task`; also the job's `-j`.
    pub cpus_per_task: u32,
    /// `--mem`.
    pub mem: String,
    /// `--time`.
    pub time: String,
    /// `--partition`, when set.
    pub partition: Option<String>,
    /// Extra `#SBATCH` lines.
    pub extra: Vec<String>,
}

impl Default for JobResources {
    fn default() -> Self {
        Self {
            cpus_per_task: DEFAULT_CPUS_PER_TASK,
            mem: DEFAULT_MEM.to_string(),
            time: DEFAULT_TIME.to_string(),
            partition: None,
            extra: Vec::new(),
        }
    }
}

/// Resolved cluster settings.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ClusterOptions {
    /// Parts of each partitioned stage.
    pub parts: u32,
    /// Node-local scratch folder; `None`: `$SLURM_TMPDIR`, `$TMPDIR` or `/tmp`.
    pub scratch: Option<std::path::PathBuf>,
    /// Most bytes of fetched clips on scratch at once.
    pub scratch_limit_bytes: u64,
    /// Where the finished shards are uploaded.
    pub publish: Option<String>,
    /// The program the jobs run (`None`: the submitting binary).
    pub program: Option<String>,
    /// Object store connection.
    pub store: StoreOptions,
    /// Resources by job name; a job not listed takes `default`.
    pub jobs: BTreeMap<String, JobResources>,
}

impl Default for ClusterOptions {
    fn default() -> Self {
        Self {
            parts: DEFAULT_PARTS,
            scratch: None,
            scratch_limit_bytes: (DEFAULT_SCRATCH_LIMIT_GB * 1e9) as u64,
            publish: None,
            program: None,
            store: StoreOptions {
                part_size: (DEFAULT_PART_SIZE_MB * 1e6) as usize,
                ..StoreOptions::default()
            },
            jobs: BTreeMap::new(),
        }
    }
}

impl ClusterOptions {
    /// The resources of job `kind` (`decode`, `merge`, ...), falling back to `default`.
    pub fn job(&self, kind: &str) -> JobResources {
        self.jobs
            .get(kind)
            .or_else(|| self.jobs.get("default"))
            .cloned()
            .unwrap_or_default()
    }
}

/// Whether `s` is a Slurm memory size: digits with an optional K, M, G or T.
pub fn is_slurm_mem(s: &str) -> bool {
    let digits = s.trim_end_matches(['K', 'M', 'G', 'T', 'k', 'm', 'g', 't']);
    !digits.is_empty() && digits.len() + 1 >= s.len() && digits.chars().all(|c| c.is_ascii_digit())
}

/// Whether `s` is a Slurm time limit: `M`, `M:S`, `H:M:S`, `D-H`, `D-H:M` or `D-H:M:S`.
pub fn is_slurm_time(s: &str) -> bool {
    let num = |p: &str| !p.is_empty() && p.len() <= 4 && p.chars().all(|c| c.is_ascii_digit());
    let (days, rest) = match s.split_once('-') {
        Some((d, r)) => (Some(d), r),
        None => (None, s),
    };
    if days.is_some_and(|d| !num(d)) {
        return false;
    }
    let fields: Vec<&str> = rest.split(':').collect();
    fields.iter().all(|f| num(f)) && (1..=3).contains(&fields.len())
}

/// Whether `s` names an object store location this build can reach.
pub fn is_store_url(s: &str) -> bool {
    ["s3://", "gs://", "az://", "abfs://", "file://"]
        .iter()
        .any(|p| s.starts_with(p))
}

/// Resolves `[cluster]`, recording problems.
pub fn resolve(raw: &RawCluster, problems: &mut Problems<'_>) -> ClusterOptions {
    let RawCluster {
        parts,
        scratch,
        scratch_limit_gb,
        publish,
        program,
        store,
        jobs,
    } = raw;
    let d = ClusterOptions::default();
    let parts = match parts {
        None => d.parts,
        Some(p) if !(1..=100_000).contains(p.get_ref()) => {
            problems.at(
                "cluster.parts",
                p.span(),
                format!("must be an integer from 1 to 100000 (got {})", p.get_ref()),
            );
            d.parts
        }
        Some(p) => *p.get_ref() as u32,
    };
    let scratch = scratch.as_ref().map(|s| {
        let path = std::path::PathBuf::from(s.get_ref());
        if !path.is_absolute() {
            problems.at(
                "cluster.scratch",
                s.span(),
                "must be an absolute folder (it is on each node)",
            );
        }
        path
    });
    let scratch_limit_bytes = match scratch_limit_gb {
        None => d.scratch_limit_bytes,
        Some(g) if !(g.get_ref().is_finite() && *g.get_ref() > 0.0) => {
            problems.at(
                "cluster.scratch-limit-gb",
                g.span(),
                format!("must be a positive number (got {})", g.get_ref()),
            );
            d.scratch_limit_bytes
        }
        Some(g) => (g.get_ref() * 1e9) as u64,
    };
    let publish = publish.as_ref().map(|u| {
        if !is_store_url(u.get_ref()) {
            problems.at(
                "cluster.publish",
                u.span(),
                format!(
                    "must be an s3://, gs://, az:// or file:// URL (got `{}`)",
                    u.get_ref()
                ),
            );
        }
        u.get_ref().trim_end_matches('/').to_string()
    });
    let RawStore {
        endpoint,
        region,
        allow_http,
        virtual_hosted,
        part_size_mb,
    } = store;
    let part_size = match part_size_mb {
        None => d.store.part_size,
        // S3 refuses parts under 5 MiB except the last (common practice, no source).
        Some(m) if !(m.get_ref().is_finite() && (5.3..=5000.0).contains(m.get_ref())) => {
            problems.at(
                "cluster.store.part-size-mb",
                m.span(),
                format!(
                    "must be from 5.3 to 5000 (S3's smallest part is 5 MiB; got {})",
                    m.get_ref()
                ),
            );
            d.store.part_size
        }
        Some(m) => (m.get_ref() * 1e6) as usize,
    };
    let store = StoreOptions {
        endpoint: endpoint.clone(),
        region: region.clone(),
        allow_http: allow_http.unwrap_or(false),
        virtual_hosted: virtual_hosted.unwrap_or(false),
        part_size,
    };
    let mut resolved_jobs = BTreeMap::new();
    let base = jobs
        .get("default")
        .map(|j| j.get_ref().clone())
        .unwrap_or_default();
    for (name, job) in jobs {
        let key = format!("cluster.jobs.{name}");
        if !JOB_KINDS.contains(&name.as_str()) {
            problems.at(
                &key,
                job.span(),
                format!("unknown job; allowed: {}", JOB_KINDS.join(", ")),
            );
            continue;
        }
        let j = job.get_ref();
        let pick = |a: &Option<String>, b: &Option<String>| a.clone().or_else(|| b.clone());
        let cpus = j.cpus_per_task.or(base.cpus_per_task);
        let mem = pick(&j.mem, &base.mem);
        let time = pick(&j.time, &base.time);
        let mut r = JobResources::default();
        if let Some(c) = cpus {
            if (1..=4096).contains(&c) {
                r.cpus_per_task = c as u32;
            } else {
                problems.at(
                    &key,
                    job.span(),
                    format!("`cpus-per-task` must be from 1 to 4096 (got {c})"),
                );
            }
        }
        if let Some(m) = mem {
            if is_slurm_mem(&m) {
                r.mem = m;
            } else {
                problems.at(
                    &key,
                    job.span(),
                    format!("`mem` must be a number with K, M, G or T, like \"8G\" (got `{m}`)"),
                );
            }
        }
        if let Some(t) = time {
            if is_slurm_time(&t) {
                r.time = t;
            } else {
                problems.at(
                    &key,
                    job.span(),
                    format!(
                        "`time` must be minutes, H:M:S or D-H:M:S, like \"02:00:00\" (got `{t}`)"
                    ),
                );
            }
        }
        r.partition = pick(&j.partition, &base.partition);
        let extra = j
            .extra
            .clone()
            .or_else(|| base.extra.clone())
            .unwrap_or_default();
        for line in &extra {
            if !line.starts_with('-') || line.contains('\n') {
                problems.at(
                    &key,
                    job.span(),
                    format!(
                        "each `extra` entry is one sbatch option starting with `-` (got `{line}`)"
                    ),
                );
            }
        }
        r.extra = extra;
        resolved_jobs.insert(name.clone(), r);
    }
    if let Some(p) = program.as_ref().filter(|p| p.get_ref().trim().is_empty()) {
        problems.at(
            "cluster.program",
            p.span(),
            "must name the actuary program on the nodes",
        );
    }
    ClusterOptions {
        parts,
        scratch,
        scratch_limit_bytes,
        publish,
        program: program.as_ref().map(|p| p.get_ref().clone()),
        store,
        jobs: resolved_jobs,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn resolve_text(text: &str) -> (ClusterOptions, Vec<String>) {
        crate::spec::checks::resolve_text::<RawCluster, _>(text, resolve)
    }

    #[test]
    fn defaults_when_empty() {
        let (o, problems) = resolve_text("");
        assert!(problems.is_empty());
        assert_eq!(o, ClusterOptions::default());
        assert_eq!(o.job("decode"), JobResources::default());
    }

    #[test]
    fn every_key_parses_and_jobs_inherit_default() {
        let text = "parts = 8\nscratch = \"/local\"\nscratch-limit-gb = 1.5\npublish = \"s3://b/p/\"\n\
                    program = \"/opt/actuary\"\n[store]\nendpoint = \"http://127.0.0.1:9000\"\nregion = \"r\"\n\
                    allow-http = true\nvirtual-hosted = false\npart-size-mb = 8\n\
                    [jobs.default]\ncpus-per-task = 2\nmem = \"4G\"\ntime = \"1-00:00\"\npartition = \"cpu\"\n\
                    extra = [\"--account=lab\"]\n[jobs.fit]\ncpus-per-task = 16\n";
        let (o, problems) = resolve_text(text);
        assert!(problems.is_empty(), "{problems:?}");
        assert_eq!(o.parts, 8);
        assert_eq!(o.scratch_limit_bytes, 1_500_000_000);
        assert_eq!(o.publish.as_deref(), Some("s3://b/p"));
        assert_eq!(o.store.part_size, 8_000_000);
        let fit = o.job("fit");
        assert_eq!(
            (
                fit.cpus_per_task,
                fit.mem.as_str(),
                fit.partition.as_deref()
            ),
            (16, "4G", Some("cpu"))
        );
        assert_eq!(fit.extra, vec!["--account=lab".to_string()]);
        assert_eq!(o.job("label").cpus_per_task, 2);
    }

    #[test]
    fn bad_values_are_reported_with_lines() {
        let text = "parts = 0\nscratch = \"rel\"\npublish = \"http://x\"\n[jobs.decode]\nmem = \"lots\"\n[jobs.cook]\n";
        let (_, problems) = resolve_text(text);
        assert_eq!(problems.len(), 5, "{problems:?}");
        assert!(problems[0].contains("line 1") && problems[0].contains("cluster.parts"));
        assert!(problems.iter().any(|p| p.contains("cluster.jobs.cook")));
        assert!(toml::from_str::<RawCluster>("[store]\naccess-key = \"x\"").is_err());
    }

    #[test]
    fn slurm_syntax_checks() {
        for ok in ["30", "10:00", "02:00:00", "1-0", "1-02:00", "2-00:00:00"] {
            assert!(is_slurm_time(ok), "{ok}");
        }
        for bad in ["", "1h", "1-", "1:2:3:4", "a-1"] {
            assert!(!is_slurm_time(bad), "{bad}");
        }
        for ok in ["100", "8G", "512M"] {
            assert!(is_slurm_mem(ok), "{ok}");
        }
        for bad in ["", "G", "8GB", "8 G"] {
            assert!(!is_slurm_mem(bad), "{bad}");
        }
    }
}
