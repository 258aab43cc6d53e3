//! `actuary check`: validate a spec and every input it names in one pass —
//! probe each clip, parse each sidecar, compare sidecar headers within a set
//! and against `[actions] map` — and list every problem found.

use std::collections::BTreeMap;
use std::path::PathBuf;

use rayon::prelude::*;
use serde::Serialize;

use crate::inputs::{self, ClipInput};
use crate::spec::Spec;

/// One problem with one input file.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct InputProblem {
    /// The file (clip, sidecar or folder).
    pub path: PathBuf,
    /// What is wrong (the message names the line for text files).
    pub message: String,
}

/// What `check` found.
#[derive(Debug, Clone, Serialize, Default)]
pub struct CheckReport {
    /// Clips found per set.
    pub clips: BTreeMap<String, usize>,
    /// Sidecars parsed.
    pub sidecars: usize,
    /// Every problem found.
    pub problems: Vec<InputProblem>,
}

impl CheckReport {
    /// Whether nothing is wrong.
    pub fn ok(&self) -> bool {
        self.problems.is_empty()
    }
}

/// Checks every input of an already-resolved spec.
pub fn check_inputs(spec: &Spec, threads: usize) -> CheckReport {
    let mut report = CheckReport::default();
    let mut clips: Vec<ClipInput> = Vec::new();
    for set in &spec.sets {
        match inputs::list_set(set) {
            Ok(list) => {
                report.clips.insert(set.name.clone(), list.len());
                if list.is_empty() {
                    report.problems.push(InputProblem {
                        path: set.dir.clone(),
                        message: format!(
                            "set `{}` has no clips ({})",
                            set.name,
                            inputs::CLIP_EXTENSIONS.join(", ")
                        ),
                    });
                }
                clips.extend(list);
            }
            Err(e) => report.problems.push(InputProblem {
                path: set.dir.clone(),
                message: e.to_string(),
            }),
        }
    }
    // Clip ids must be unique across sets so that rows can be told apart by id alone.
    let mut seen: BTreeMap<&str, &ClipInput> = BTreeMap::new();
    for c in &clips {
        if let Some(first) = seen.insert(&c.id, c) {
            report.problems.push(InputProblem {
                path: c.path.clone(),
                message: format!(
                    "clip id `{}` is also used by {} (set `{}`); `export-frames` then needs --set",
                    c.id,
                    first.path.display(),
                    first.set
                ),
            });
        }
    }
    let results: Vec<ClipCheck> = crate::util::thread_pool(threads)
        .install(|| clips.par_iter().map(|c| check_clip(spec, c)).collect());
    let mut headers: BTreeMap<String, (Vec<String>, PathBuf)> = BTreeMap::new();
    for (clip, result) in clips.iter().zip(results) {
        report.problems.extend(result.problems);
        if let Some(dims) = result.dims {
            report.sidecars += 1;
            let sidecar = clip.sidecar.clone().unwrap_or_default();
            match headers.get(&clip.set) {
                None => {
                    for name in spec.actions.map.keys() {
                        if !dims.contains(name) {
                            report.problems.push(InputProblem {
                                path: sidecar.clone(),
                                message: format!(
                                    "`[actions] map` names `{name}`, which is not a column of this sidecar (columns: {})",
                                    dims.join(", ")
                                ),
                            });
                        }
                    }
                    headers.insert(clip.set.clone(), (dims, sidecar));
                }
                Some((first, first_path)) if *first != dims => report.problems.push(InputProblem {
                    path: sidecar,
                    message: format!(
                        "header t,{} differs from t,{} in {} (every sidecar of a set has the same header)",
                        dims.join(","),
                        first.join(","),
                        first_path.display()
                    ),
                }),
                Some(_) => {}
            }
        }
    }
    // The fit stage splits labelled clips by clip into train, calib and
    // holdout (held-out sets' clips apart: they never train).
    let labelled = clips
        .iter()
        .filter(|c| c.labelled && !spec.fit.held_out_sets.contains(&c.set))
        .count();
    if labelled > 0
        && let Err(e) =
            crate::fit::split_counts(labelled, spec.fit.calib_fraction, spec.fit.holdout_fraction)
    {
        report.problems.push(InputProblem {
            path: spec.path.clone(),
            message: e.to_string(),
        });
    }
    let dims: Vec<&Vec<String>> = headers.values().map(|(d, _)| d).collect();
    if dims.windows(2).any(|w| w[0] != w[1]) {
        report.problems.push(InputProblem {
            path: spec.path.clone(),
            message:
                "labelled sets have different action dimensions; they must share one action space"
                    .into(),
        });
    }
    report
}

struct ClipCheck {
    problems: Vec<InputProblem>,
    dims: Option<Vec<String>>,
}

fn check_clip(spec: &Spec, clip: &ClipInput) -> ClipCheck {
    let mut problems = Vec::new();
    if let Err(e) = crate::decode::probe_checked(&clip.path, &spec.decode) {
        problems.push(InputProblem {
            path: clip.path.clone(),
            message: e.to_string(),
        });
    }
    let mut dims = None;
    if clip.labelled {
        match &clip.sidecar {
            None => problems.push(InputProblem {
                path: clip.path.clone(),
                message: format!(
                    "labelled clip has no sidecar (expected {} or .actions.parquet)",
                    crate::store::clips::with_suffix(&clip.path.with_extension(""), ".actions.csv")
                        .display()
                ),
            }),
            Some(path) => match crate::actions::read_sidecar(path) {
                Ok(s) => dims = Some(s.dims.clone()),
                Err(e) => problems.push(InputProblem {
                    path: path.clone(),
                    message: e.to_string(),
                }),
            },
        }
    }
    ClipCheck { problems, dims }
}
