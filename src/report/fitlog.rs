//! Reading the fit stage's outputs for the report: the per-step training log
//! (a CSV with a header row of column names and numeric rows) and the
//! comparison table of models on evaluation sets, read leniently from
//! `RUN/fit/metrics.json` (or the manifest summary) so that a change of
//! layout degrades to a note rather than an error.

use std::collections::BTreeMap;
use std::path::Path;

use super::figures::ComparisonRow;

/// A parsed training log.
#[derive(Debug, Clone, PartialEq)]
pub struct TrainLog {
    /// Column names from the header.
    pub columns: Vec<String>,
    /// Rows; unparsable cells are NaN.
    pub rows: Vec<Vec<f64>>,
}

impl TrainLog {
    /// Parses CSV text (header row, comma-separated numbers).
    pub fn parse(text: &str) -> Option<Self> {
        let mut lines = text.lines().filter(|l| !l.trim().is_empty());
        let columns: Vec<String> = lines
            .next()?
            .split(',')
            .map(|c| c.trim().to_string())
            .collect();
        let rows = lines
            .map(|l| {
                let mut r: Vec<f64> = l
                    .split(',')
                    .map(|c| c.trim().parse().unwrap_or(f64::NAN))
                    .collect();
                r.resize(columns.len(), f64::NAN);
                r
            })
            .collect();
        Some(Self { columns, rows })
    }

    /// The column called `name`.
    pub fn column(&self, name: &str) -> Option<Vec<f64>> {
        let i = self.columns.iter().position(|c| c == name)?;
        Some(self.rows.iter().map(|r| r[i]).collect())
    }

    /// The x axis: the `step` column (or `iteration`, `epoch`), else the row index.
    pub fn steps(&self) -> (String, Vec<f64>) {
        for name in ["step", "iteration", "iter", "epoch"] {
            if let Some(c) = self.column(name) {
                return (name.to_string(), c);
            }
        }
        (
            "row".to_string(),
            (0..self.rows.len()).map(|i| i as f64).collect(),
        )
    }
}

/// Finds the training log in `fit_dir`: a `.csv` whose name mentions `log`
/// or `train` (else the only `.csv`); returns its name and contents.
pub fn find_log(fit_dir: &Path) -> (Option<String>, Option<TrainLog>) {
    let Ok(rd) = std::fs::read_dir(fit_dir) else {
        return (None, None);
    };
    let mut csvs: Vec<String> = rd
        .filter_map(|e| e.ok())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.ends_with(".csv") && !n.ends_with(".tmp"))
        .collect();
    csvs.sort();
    let pick = csvs
        .iter()
        .find(|n| n.contains("log") || n.contains("train"))
        .or(if csvs.len() == 1 { csvs.first() } else { None })
        .cloned();
    let log = pick
        .as_ref()
        .and_then(|n| std::fs::read_to_string(fit_dir.join(n)).ok())
        .and_then(|t| TrainLog::parse(&t));
    (pick, log)
}

/// The comparison table from a fit metrics value. Understands a list of rows
/// (`{model, eval|set|on, dims: {dim: {r2, mae, nll}}}` or one row per
/// dimension with `dim` and numeric fields) and nested maps
/// `model -> eval -> dim -> figure`, under `comparison` or at the top.
pub fn comparison_rows(v: &serde_json::Value) -> Vec<ComparisonRow> {
    let table = v.get("comparison").unwrap_or(v);
    let mut rows: Vec<ComparisonRow> = Vec::new();
    let mut add = |model: &str, eval: &str, dim: &str, figs: BTreeMap<String, f64>| {
        if figs.is_empty() {
            return;
        }
        match rows.iter_mut().find(|r| r.model == model && r.eval == eval) {
            Some(r) => {
                r.dims.entry(dim.to_string()).or_default().extend(figs);
            }
            None => rows.push(ComparisonRow {
                model: model.to_string(),
                eval: eval.to_string(),
                dims: BTreeMap::from([(dim.to_string(), figs)]),
            }),
        }
    };
    let numbers = |o: &serde_json::Value| -> BTreeMap<String, f64> {
        o.as_object()
            .map(|m| {
                m.iter()
                    .filter_map(|(k, v)| v.as_f64().map(|x| (k.clone(), x)))
                    .collect()
            })
            .unwrap_or_default()
    };
    let text = |o: &serde_json::Value, keys: &[&str]| -> Option<String> {
        keys.iter()
            .find_map(|k| o.get(*k).and_then(|v| v.as_str()).map(String::from))
    };
    match table {
        serde_json::Value::Array(list) => {
            for row in list {
                let model = text(row, &["model", "name"]).unwrap_or_else(|| "?".into());
                let eval = text(row, &["eval", "set", "on", "data", "split"])
                    .unwrap_or_else(|| "holdout".into());
                match row.get("dims").or_else(|| row.get("per_dim")) {
                    Some(serde_json::Value::Object(dims)) => {
                        for (d, figs) in dims {
                            add(&model, &eval, d, numbers(figs));
                        }
                    }
                    Some(serde_json::Value::Array(dims)) => {
                        for figs in dims {
                            let d = text(figs, &["dim", "name"]).unwrap_or_else(|| "?".into());
                            add(&model, &eval, &d, numbers(figs));
                        }
                    }
                    _ => {
                        let d = text(row, &["dim", "dimension"]).unwrap_or_else(|| "all".into());
                        add(&model, &eval, &d, numbers(row));
                    }
                }
            }
        }
        serde_json::Value::Object(models) if table.get("comparison").is_none() => {
            for (model, evals) in models {
                for (eval, dims) in evals.as_object().into_iter().flatten() {
                    for (d, figs) in dims.as_object().into_iter().flatten() {
                        add(model, eval, d, numbers(figs));
                    }
                }
            }
        }
        _ => {}
    }
    rows
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_parses_header_and_numbers() {
        let log = TrainLog::parse("step,elbo,nll\n0,1.5,2\n1,1.25,x\n").unwrap();
        assert_eq!(log.columns, ["step", "elbo", "nll"]);
        assert_eq!(log.column("elbo"), Some(vec![1.5, 1.25]));
        assert!(log.rows[1][2].is_nan());
        assert_eq!(log.steps().1, vec![0.0, 1.0]);
    }

    #[test]
    fn comparison_reads_rows_and_nested_maps() {
        let rows = comparison_rows(&serde_json::json!({"comparison": [
            {"model": "semi-supervised", "eval": "holdout", "dims": {"dx": {"r2": 0.9, "mae": 0.1}}},
            {"model": "semi-supervised", "eval": "holdout", "dim": "dy", "r2": 0.8}
        ]}));
        assert_eq!(rows.len(), 1);
        assert_eq!(rows[0].dims["dx"]["r2"], 0.9);
        assert_eq!(rows[0].dims["dy"]["r2"], 0.8);
        let nested = comparison_rows(
            &serde_json::json!({"labelled-only": {"holdout": {"dx": {"r2": 0.5}}}}),
        );
        assert_eq!(nested[0].model, "labelled-only");
        assert_eq!(nested[0].dims["dx"]["r2"], 0.5);
    }
}
