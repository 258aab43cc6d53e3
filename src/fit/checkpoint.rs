//! Checkpoints and model files (safetensors, f32 little-endian).
//!
//! A checkpoint holds everything a killed fit needs to continue exactly:
//! parameters (`param/<name>`), AdamW moments (`adam-m/<name>`,
//! `adam-v/<name>`), and in the safetensors metadata the step, the sampler's
//! RNG state, the settings hash and the network-shape hash. A model file holds
//! the parameters under their own names (the `VarBuilder` paths) and the same
//! hashes. Loading checks the hashes and every name and shape *before* any
//! value is copied into the network, so a mismatching file is refused whole.

use std::collections::{BTreeMap, HashMap};
use std::path::Path;

use candle_core::{DType, Tensor, Var};
use safetensors::{Dtype, SafeTensors, tensor::TensorView};

use super::FitError;
use crate::model::optim::Moments;

/// `format` metadata value of a training checkpoint.
pub const CHECKPOINT_FORMAT: &str = "actuary-fit-checkpoint-1";
/// `format` metadata value of a fitted model file.
pub const MODEL_FORMAT: &str = "actuary-fit-model-1";

/// Identity of a training run, recorded in and checked against files.
#[derive(Debug, Clone, PartialEq)]
pub struct Identity {
    /// Hash of the stage settings and inputs.
    pub settings: String,
    /// Hash of the network configuration.
    pub network: String,
}

/// A training state read back from a checkpoint.
pub struct Restored {
    /// Steps done.
    pub step: u32,
    /// Sampler RNG state.
    pub rng: [u64; 4],
    /// AdamW moments by parameter name.
    pub moments: BTreeMap<String, Moments>,
}

fn f32_bytes(v: &[f32]) -> Vec<u8> {
    v.iter().flat_map(|x| x.to_le_bytes()).collect()
}

fn bytes_f32(b: &[u8]) -> Vec<f32> {
    b.chunks_exact(4)
        .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
        .collect()
}

fn values(var: &Var) -> Result<Vec<f32>, FitError> {
    Ok(var
        .as_tensor()
        .flatten_all()?
        .to_dtype(DType::F32)?
        .to_vec1()?)
}

/// Sorted `(name, var)` pairs of a var map.
pub fn sorted_vars(map: &candle_nn::VarMap) -> Vec<(String, Var)> {
    let mut v: Vec<(String, Var)> = map
        .data()
        .lock()
        .expect("var map lock")
        .iter()
        .map(|(k, v)| (k.clone(), v.clone()))
        .collect();
    v.sort_by(|a, b| a.0.cmp(&b.0));
    v
}

fn write(
    path: &Path,
    tensors: Vec<(String, Vec<usize>, Vec<u8>)>,
    meta: HashMap<String, String>,
) -> Result<(), FitError> {
    let views: Vec<(String, TensorView<'_>)> = tensors
        .iter()
        .map(|(n, shape, bytes)| {
            let view = TensorView::new(Dtype::F32, shape.clone(), bytes).expect("sizes agree");
            (n.clone(), view)
        })
        .collect();
    let buf = safetensors::serialize(views, Some(meta)).map_err(|e| FitError::Corrupt {
        path: path.to_path_buf(),
        reason: format!("cannot serialise: {e}"),
    })?;
    if let Some(dir) = path.parent() {
        std::fs::create_dir_all(dir).map_err(FitError::io(dir))?;
    }
    crate::store::write_atomic(path, &buf).map_err(FitError::io(path))
}

fn base_meta(format: &str, id: &Identity, network_json: &str) -> HashMap<String, String> {
    HashMap::from([
        ("format".to_string(), format.to_string()),
        ("settings-hash".to_string(), id.settings.clone()),
        ("network-hash".to_string(), id.network.clone()),
        ("network".to_string(), network_json.to_string()),
    ])
}

/// Writes a training checkpoint atomically.
pub fn save_checkpoint(
    path: &Path,
    id: &Identity,
    network_json: &str,
    vars: &[(String, Var)],
    step: u32,
    rng: [u64; 4],
    moments: &BTreeMap<String, Moments>,
) -> Result<(), FitError> {
    let mut tensors = Vec::with_capacity(vars.len() * 3);
    for (name, var) in vars {
        let shape = var.dims().to_vec();
        tensors.push((
            format!("param/{name}"),
            shape.clone(),
            f32_bytes(&values(var)?),
        ));
        let m = &moments[name];
        tensors.push((format!("adam-m/{name}"), shape.clone(), f32_bytes(&m.m)));
        tensors.push((format!("adam-v/{name}"), shape, f32_bytes(&m.v)));
    }
    let mut meta = base_meta(CHECKPOINT_FORMAT, id, network_json);
    meta.insert("step".into(), step.to_string());
    meta.insert(
        "rng".into(),
        rng.iter()
            .map(|w| format!("{w:016x}"))
            .collect::<Vec<_>>()
            .join(","),
    );
    write(path, tensors, meta)
}

/// Writes a fitted model's parameters atomically.
pub fn save_model(
    path: &Path,
    id: &Identity,
    network_json: &str,
    vars: &[(String, Var)],
) -> Result<(), FitError> {
    let mut tensors = Vec::with_capacity(vars.len());
    for (name, var) in vars {
        tensors.push((name.clone(), var.dims().to_vec(), f32_bytes(&values(var)?)));
    }
    write(path, tensors, base_meta(MODEL_FORMAT, id, network_json))
}

fn corrupt(path: &Path, reason: impl Into<String>) -> FitError {
    FitError::Corrupt {
        path: path.to_path_buf(),
        reason: reason.into(),
    }
}

/// Reads the metadata and checks the format, the network hash and the
/// settings hash.
fn check_identity(
    path: &Path,
    buf: &[u8],
    format: &str,
    id: &Identity,
) -> Result<HashMap<String, String>, FitError> {
    let (_, header) = SafeTensors::read_metadata(buf)
        .map_err(|e| corrupt(path, format!("not a safetensors file: {e}")))?;
    let meta = header.metadata().clone().unwrap_or_default();
    let got = meta.get("format").map(String::as_str).unwrap_or("");
    if got != format {
        return Err(corrupt(
            path,
            format!("format is {got:?}, expected {format:?}"),
        ));
    }
    let recorded_net = meta.get("network-hash").cloned().unwrap_or_default();
    if recorded_net != id.network {
        return Err(FitError::CheckpointMismatch {
            path: path.to_path_buf(),
            what: "a different network shape",
            recorded: recorded_net,
            current: id.network.clone(),
        });
    }
    let recorded = meta.get("settings-hash").cloned().unwrap_or_default();
    if recorded != id.settings {
        return Err(FitError::CheckpointMismatch {
            path: path.to_path_buf(),
            what: "different settings or inputs",
            recorded,
            current: id.settings.clone(),
        });
    }
    Ok(meta)
}

/// Checks the identity, then every parameter's presence and shape, then
/// copies the values in. `prefix` is `param/` for checkpoints and empty for
/// model files.
fn load_into(
    path: &Path,
    buf: &[u8],
    format: &str,
    id: &Identity,
    vars: &[(String, Var)],
    prefix: &str,
) -> Result<HashMap<String, String>, FitError> {
    let meta = check_identity(path, buf, format, id)?;
    let st = SafeTensors::deserialize(buf).map_err(|e| corrupt(path, e.to_string()))?;
    let mut staged = Vec::with_capacity(vars.len());
    for (name, var) in vars {
        let key = format!("{prefix}{name}");
        let view = st
            .tensor(&key)
            .map_err(|_| corrupt(path, format!("no tensor {key}")))?;
        if view.dtype() != Dtype::F32 || view.shape() != var.dims() {
            return Err(corrupt(
                path,
                format!(
                    "tensor {key} is {:?} {:?}, the network has F32 {:?}",
                    view.dtype(),
                    view.shape(),
                    var.dims()
                ),
            ));
        }
        staged.push(
            Tensor::from_vec(bytes_f32(view.data()), var.shape(), var.device())?
                .to_dtype(var.dtype())?,
        );
    }
    for ((_, var), t) in vars.iter().zip(staged) {
        var.set(&t)?;
    }
    Ok(meta)
}

/// Restores parameters from a checkpoint and returns the rest of its state.
pub fn load_checkpoint(
    path: &Path,
    id: &Identity,
    vars: &[(String, Var)],
) -> Result<Restored, FitError> {
    let buf = std::fs::read(path).map_err(FitError::io(path))?;
    // Identity, moments and metadata are checked before `load_into` sets any parameter.
    let meta = check_identity(path, &buf, CHECKPOINT_FORMAT, id)?;
    let st = SafeTensors::deserialize(&buf).map_err(|e| corrupt(path, e.to_string()))?;
    let mut moments = BTreeMap::new();
    for (name, var) in vars {
        let get = |k: String| -> Result<Vec<f32>, FitError> {
            let v = st
                .tensor(&k)
                .map_err(|_| corrupt(path, format!("no tensor {k}")))?;
            if v.shape() != var.dims() || v.dtype() != Dtype::F32 {
                return Err(corrupt(
                    path,
                    format!("tensor {k} has shape {:?}", v.shape()),
                ));
            }
            Ok(bytes_f32(v.data()))
        };
        let m = Moments {
            m: get(format!("adam-m/{name}"))?,
            v: get(format!("adam-v/{name}"))?,
        };
        moments.insert(name.clone(), m);
    }
    let step: u32 = meta
        .get("step")
        .and_then(|s| s.parse().ok())
        .ok_or_else(|| corrupt(path, "no step in metadata"))?;
    let words: Vec<u64> = meta
        .get("rng")
        .map(|s| {
            s.split(',')
                .filter_map(|w| u64::from_str_radix(w, 16).ok())
                .collect()
        })
        .unwrap_or_default();
    let rng: [u64; 4] = words
        .try_into()
        .map_err(|_| corrupt(path, "no RNG state in metadata"))?;
    load_into(path, &buf, CHECKPOINT_FORMAT, id, vars, "param/")?;
    Ok(Restored { step, rng, moments })
}

/// Loads a fitted model file's parameters into `vars`.
pub fn load_model(path: &Path, id: &Identity, vars: &[(String, Var)]) -> Result<(), FitError> {
    let buf = std::fs::read(path).map_err(FitError::io(path))?;
    load_into(path, &buf, MODEL_FORMAT, id, vars, "")?;
    Ok(())
}
