//! `inspect RUN label`: interval coverage per dimension, confidence
//! reliability, code usage and confidence per set, from `RUN/label/`.

use std::collections::BTreeMap;
use std::fmt::Write as _;
use std::path::Path;

use serde::Serialize;

use super::output::{CALIBRATION_FILE, CODES_FILE, CalibrationFigures, CodesTable};
use super::stage::SetSummary;
use crate::store::StageManifest;

/// What `inspect RUN label` reports.
#[derive(Debug, Clone, Serialize)]
pub struct LabelInspection {
    /// Calibration figures.
    pub calibration: CalibrationFigures,
    /// Codes table.
    pub codes: CodesTable,
    /// Per set (from the stage manifest, when present).
    pub sets: BTreeMap<String, SetSummary>,
}

impl LabelInspection {
    /// A plain-text rendering.
    pub fn render(&self) -> String {
        let c = &self.calibration;
        let mut out = String::new();
        let _ = writeln!(
            out,
            "  intervals: action_est +- {:.3} * action_std, nominal coverage {:.3}; {} calib / {} holdout transitions",
            c.z,
            1.0 - c.alpha,
            c.calib_transitions,
            c.holdout_transitions
        );
        let _ = writeln!(
            out,
            "  {:<12} {:>10} {:>10} {:>10} {:>12}",
            "dim", "quantile", "calib", "holdout", "tolerance"
        );
        for d in &c.dims {
            let h = d
                .holdout_coverage
                .map_or("-".to_string(), |v| format!("{v:.3}"));
            let _ = writeln!(
                out,
                "  {:<12} {:>10.4} {:>10.3} {:>10} {:>12.5}",
                d.dim, d.quantile.q, d.calib_coverage, h, d.tolerance
            );
        }
        let r = &c.holdout_reliability;
        let _ = writeln!(
            out,
            "  confidence on holdout: ECE {:.4} (uncalibrated {:.4}) over {} bins, mean {:.3}, within tolerance {:.3}",
            r.ece,
            c.holdout_reliability_raw.ece,
            r.bins.len(),
            r.mean_confidence,
            r.accuracy
        );
        for b in r.bins.iter().filter(|b| b.count > 0) {
            let _ = writeln!(
                out,
                "    [{:.1}, {:.1}) n {:>6}  confidence {:.3}  within {:.3}",
                b.lo, b.hi, b.count, b.mean_confidence, b.accuracy
            );
        }
        let _ = writeln!(
            out,
            "  ood threshold {:.4} (max calib disagreement), holdout ood rate {}",
            c.ood_threshold,
            c.holdout_ood_rate
                .map_or("-".to_string(), |v| format!("{v:.3}"))
        );
        for (name, s) in &self.sets {
            let _ = writeln!(
                out,
                "  set {name:<16} {:>5} clips {:>8} transitions  mean confidence {:.3}  ood {:.3}  beyond calib motion range {}",
                s.clips, s.transitions, s.mean_confidence, s.ood_rate, s.beyond_calib_range
            );
        }
        let used = self.codes.codes.iter().filter(|c| c.count > 0).count();
        let _ = writeln!(
            out,
            "  codes: {used} of {} used (inertia {:.3} on {} points)",
            self.codes.codes.len(),
            self.codes.inertia,
            self.codes.fitted_points
        );
        for code in &self.codes.codes {
            let mean: Vec<String> = code.mean_action.iter().map(|v| format!("{v:.4}")).collect();
            let _ = writeln!(
                out,
                "    code {:>3} {:>8} transitions ({} labelled)  mean action [{}]",
                code.code,
                code.count,
                code.count_labelled,
                mean.join(", ")
            );
        }
        out
    }
}

/// Reads the label stage's figures from `run_dir`.
pub fn inspect_label(run_dir: &Path) -> std::io::Result<LabelInspection> {
    let dir = run_dir.join("label");
    let calibration: CalibrationFigures = crate::store::read_json(&dir.join(CALIBRATION_FILE))?;
    let codes: CodesTable = crate::store::read_json(&dir.join(CODES_FILE))?;
    let sets = StageManifest::read(run_dir, "label")?
        .and_then(|m| m.summary.get("sets").cloned())
        .and_then(|v| serde_json::from_value(v).ok())
        .unwrap_or_default();
    Ok(LabelInspection {
        calibration,
        codes,
        sets,
    })
}
