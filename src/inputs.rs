//! Finding the clips of each set: videos by extension, searched recursively,
//! ids from the path relative to the set folder, and each labelled clip's
//! action sidecar.

use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::spec::{SetSpec, Spec};

/// File extensions treated as clips (lower-case, without the dot).
pub const CLIP_EXTENSIONS: &[&str] = &["mp4", "mov", "mkv", "avi", "webm", "m4v"];

/// One clip found in a set.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct ClipInput {
    /// Set name.
    pub set: String,
    /// Whether the set is labelled.
    pub labelled: bool,
    /// Clip id: path relative to the set folder without extension, `/`-separated.
    pub id: String,
    /// The clip file.
    pub path: PathBuf,
    /// The action sidecar, when one exists next to the clip.
    pub sidecar: Option<PathBuf>,
}

/// Errors listing a set.
#[derive(Debug, thiserror::Error)]
pub enum InputsError {
    /// A folder could not be read.
    #[error("cannot list clip folder {path}: {source}")]
    List {
        /// The folder.
        path: PathBuf,
        /// The cause.
        #[source]
        source: std::io::Error,
    },
    /// A set in object storage could not be listed.
    #[error("cannot list clip set {url}: {reason}")]
    Remote {
        /// The set's URL.
        url: String,
        /// Why (names the object store error, never credentials).
        reason: String,
    },
    /// Two clips in one set map to the same id (e.g. `a.mp4` and `a.mov`).
    #[error("clips {first} and {second} share the id `{id}`")]
    DuplicateId {
        /// The id.
        id: String,
        /// One clip.
        first: PathBuf,
        /// The other clip.
        second: PathBuf,
    },
}

/// Whether `path` has a clip extension.
pub fn is_clip(path: &Path) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| CLIP_EXTENSIONS.contains(&e.to_ascii_lowercase().as_str()))
}

/// The clips of one set, sorted by id.
pub fn list_set(set: &SetSpec) -> Result<Vec<ClipInput>, InputsError> {
    if crate::storage::path_is_url(&set.dir) {
        return crate::storage::list_set(set).map_err(|e| InputsError::Remote {
            url: set.dir.to_string_lossy().into_owned(),
            reason: e.to_string(),
        });
    }
    let mut files = Vec::new();
    walk(&set.dir, &mut files)?;
    let mut clips: Vec<ClipInput> = files
        .into_iter()
        .filter(|p| is_clip(p))
        .map(|path| {
            let rel = path
                .strip_prefix(&set.dir)
                .unwrap_or(&path)
                .with_extension("");
            let id = rel
                .components()
                .map(|c| c.as_os_str().to_string_lossy().into_owned())
                .collect::<Vec<_>>()
                .join("/");
            let sidecar = if set.labelled {
                crate::actions::sidecar_for(&path)
            } else {
                None
            };
            ClipInput {
                set: set.name.clone(),
                labelled: set.labelled,
                id,
                path,
                sidecar,
            }
        })
        .collect();
    clips.sort_by(|a, b| a.id.cmp(&b.id).then(a.path.cmp(&b.path)));
    for pair in clips.windows(2) {
        if pair[0].id == pair[1].id {
            return Err(InputsError::DuplicateId {
                id: pair[0].id.clone(),
                first: pair[0].path.clone(),
                second: pair[1].path.clone(),
            });
        }
    }
    Ok(clips)
}

/// The clips of every set, in set order then id order.
pub fn list_all(spec: &Spec) -> Result<Vec<ClipInput>, InputsError> {
    crate::storage::configure_store(&spec.cluster.store);
    let mut all = Vec::new();
    for set in &spec.sets {
        all.extend(list_set(set)?);
    }
    Ok(all)
}

fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> Result<(), InputsError> {
    let entries = std::fs::read_dir(dir).map_err(|source| InputsError::List {
        path: dir.to_path_buf(),
        source,
    })?;
    let mut paths: Vec<PathBuf> = entries.filter_map(|e| e.ok().map(|e| e.path())).collect();
    paths.sort();
    for path in paths {
        if path.is_dir() {
            walk(&path, out)?;
        } else {
            out.push(path);
        }
    }
    Ok(())
}
