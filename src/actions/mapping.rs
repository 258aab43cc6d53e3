//! Interval mapping of piecewise-constant series onto target intervals.
//!
//! The core works on a generic [`Series`] (row `i` is in force from `start[i]` to `end[i]`)
//! and a list of target [`Interval`]s, so the same code maps a recorded log onto the decode
//! grid and, later, estimates from a resampled time base back onto the decode grid.
//!
//! Per dimension, with the target interval `[a, b)`:
//!
//! - `hold`: the value of the last row whose start is at or before `a + HOLD_TOLERANCE_S`
//!   (a row within 1 ms of `a` counts as at it); before the first row, the first row.
//! - `mean`: `1/(b-a) ∫_a^b c(τ) dτ`, where the command signal `c` takes row `i`'s value from
//!   `start[i]` to `start[i+1]`, the first row's value before the first start and the last
//!   row's value after the last start (a command stays in force until replaced; ends are not
//!   used).
//! - `sum`: each row's value is a delta spread uniformly over its own span
//!   `[start[i], end[i])`; the target gets `Σ_i v_i · |[start_i, end_i) ∩ [a, b)| / (end_i -
//!   start_i)` (pro rata). Time outside every span contributes nothing.

use super::{ActionsError, MapRule};

/// A log row within this many seconds after a target's start counts as at it (`hold`).
pub const HOLD_TOLERANCE_S: f64 = 1e-3;

/// A piecewise-constant series: row `i` holds `values[i*dims..(i+1)*dims]` from `start[i]`
/// to `end[i]` (seconds, on the target's clock).
///
/// Valid when it has at least one row, all numbers are finite, `start` is strictly
/// increasing, `start[i] < end[i] <= start[i+1]` and `values.len() == start.len() * dims`.
#[derive(Debug, Clone, Copy)]
pub struct Series<'a> {
    /// Row start times, seconds.
    pub start: &'a [f64],
    /// Row end times, seconds (for contiguous rows, the next row's start).
    pub end: &'a [f64],
    /// Row-major values, `rows x dims`.
    pub values: &'a [f64],
    /// Number of dimensions per row.
    pub dims: usize,
}

/// A half-open target interval `[start, end)` in seconds.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Interval {
    /// Inclusive start, seconds.
    pub start: f64,
    /// Exclusive end, seconds.
    pub end: f64,
}

/// The transition intervals of a clip of `frames` frames at `fps`: interval `k` is
/// `[k/fps, (k+1)/fps)`, for `k` in `0..frames-1` (empty for fewer than two frames).
pub fn frame_intervals(fps: f64, frames: u32) -> Vec<Interval> {
    (0..frames.saturating_sub(1))
        .map(|k| Interval {
            start: f64::from(k) / fps,
            end: f64::from(k + 1) / fps,
        })
        .collect()
}

/// Ends for contiguous rows: each row ends where the next starts, the last after `last_span`.
pub fn contiguous_ends(start: &[f64], last_span: f64) -> Vec<f64> {
    let mut ends: Vec<f64> = start.iter().skip(1).copied().collect();
    if let Some(&last) = start.last() {
        ends.push(last + last_span);
    }
    ends
}

/// The median of the gaps between consecutive times (mean of the two middle gaps for an
/// even count); `None` with fewer than two times.
pub fn median_step(t: &[f64]) -> Option<f64> {
    let mut steps: Vec<f64> = t.windows(2).map(|w| w[1] - w[0]).collect();
    if steps.is_empty() {
        return None;
    }
    steps.sort_by(f64::total_cmp);
    let n = steps.len();
    Some(if n % 2 == 1 {
        steps[n / 2]
    } else {
        0.5 * (steps[n / 2 - 1] + steps[n / 2])
    })
}

/// Map `src` onto `targets`, one rule per dimension; one `dims`-vector per target.
pub fn map_series(
    src: &Series<'_>,
    rules: &[MapRule],
    targets: &[Interval],
) -> Result<Vec<Vec<f32>>, ActionsError> {
    validate(src, rules, targets)?;
    let (want_hold, want_mean, want_sum) = (
        rules.contains(&MapRule::Hold),
        rules.contains(&MapRule::Mean),
        rules.contains(&MapRule::Sum),
    );
    let mut mean = vec![0.0f64; src.dims];
    let mut sum = vec![0.0f64; src.dims];
    let mut out = Vec::with_capacity(targets.len());
    for iv in targets {
        let held = if want_hold {
            hold_row(src, iv.start)
        } else {
            0
        };
        if want_mean {
            mean_into(src, *iv, &mut mean);
        }
        if want_sum {
            sum_into(src, *iv, &mut sum);
        }
        let row = rules
            .iter()
            .enumerate()
            .map(|(d, rule)| match rule {
                MapRule::Hold => src.values[held * src.dims + d] as f32,
                MapRule::Mean => mean[d] as f32,
                MapRule::Sum => sum[d] as f32,
            })
            .collect();
        out.push(row);
    }
    Ok(out)
}

fn validate(src: &Series<'_>, rules: &[MapRule], targets: &[Interval]) -> Result<(), ActionsError> {
    let rows = src.start.len();
    if rules.len() != src.dims {
        return Err(ActionsError::RuleCount {
            rules: rules.len(),
            dims: src.dims,
        });
    }
    if rows == 0 {
        return Err(ActionsError::EmptySeries);
    }
    if src.end.len() != rows || src.values.len() != rows * src.dims {
        return Err(ActionsError::SeriesShape {
            rows,
            ends: src.end.len(),
            values: src.values.len(),
            dims: src.dims,
        });
    }
    for i in 0..rows {
        let (s, e) = (src.start[i], src.end[i]);
        let next = src.start.get(i + 1).copied().unwrap_or(f64::INFINITY);
        let values_ok = src.values[i * src.dims..(i + 1) * src.dims]
            .iter()
            .all(|v| v.is_finite());
        if !(s.is_finite() && e.is_finite() && values_ok && s < e && e <= next && s < next) {
            return Err(ActionsError::BadSeriesRow {
                row: i,
                start: s,
                end: e,
            });
        }
    }
    for (index, iv) in targets.iter().enumerate() {
        if !(iv.start.is_finite() && iv.end.is_finite() && iv.start < iv.end) {
            return Err(ActionsError::BadInterval {
                index,
                start: iv.start,
                end: iv.end,
            });
        }
    }
    Ok(())
}

/// Index of the row in force at `time` under `hold`.
fn hold_row(src: &Series<'_>, time: f64) -> usize {
    let limit = time + HOLD_TOLERANCE_S;
    src.start.partition_point(|&s| s <= limit).saturating_sub(1)
}

/// Time-weighted mean of the command signal over `iv` into `acc`.
fn mean_into(src: &Series<'_>, iv: Interval, acc: &mut [f64]) {
    acc.fill(0.0);
    let rows = src.start.len();
    // The row in force at iv.start (the first row also covers all time before it).
    let mut j = src
        .start
        .partition_point(|&s| s <= iv.start)
        .saturating_sub(1);
    let mut lo = iv.start;
    loop {
        let seg_end = if j + 1 < rows {
            src.start[j + 1]
        } else {
            f64::INFINITY
        };
        let hi = iv.end.min(seg_end);
        if hi > lo {
            let w = hi - lo;
            let vals = &src.values[j * src.dims..(j + 1) * src.dims];
            for (a, v) in acc.iter_mut().zip(vals) {
                *a += v * w;
            }
            lo = hi;
        }
        if seg_end >= iv.end || j + 1 >= rows {
            break;
        }
        j += 1;
    }
    let len = iv.end - iv.start;
    for a in acc.iter_mut() {
        *a /= len;
    }
}

/// Pro-rata sum of per-row deltas overlapping `iv` into `acc`.
fn sum_into(src: &Series<'_>, iv: Interval, acc: &mut [f64]) {
    acc.fill(0.0);
    // Ends are increasing for a valid series, so this finds the first row ending after iv.start.
    let first = src.end.partition_point(|&e| e <= iv.start);
    for j in first..src.start.len() {
        let (s, e) = (src.start[j], src.end[j]);
        if s >= iv.end {
            break;
        }
        let overlap = iv.end.min(e) - iv.start.max(s);
        if overlap <= 0.0 {
            continue;
        }
        // A row wholly inside the interval gets weight exactly 1.
        let w = if s >= iv.start && e <= iv.end {
            1.0
        } else {
            overlap / (e - s)
        };
        let vals = &src.values[j * src.dims..(j + 1) * src.dims];
        for (a, v) in acc.iter_mut().zip(vals) {
            *a += v * w;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn series<'a>(start: &'a [f64], end: &'a [f64], values: &'a [f64]) -> Series<'a> {
        Series {
            start,
            end,
            values,
            dims: 1,
        }
    }

    #[test]
    fn five_50hz_deltas_make_one_10fps_delta() {
        // Worked example from the input contract: five 50 Hz deltas sum into one 10 fps delta.
        let start: Vec<f64> = (0..10).map(|i| f64::from(i) * 0.02).collect();
        let end = contiguous_ends(&start, 0.02);
        let values = [1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0];
        let out = map_series(
            &series(&start, &end, &values),
            &[MapRule::Sum],
            &frame_intervals(10.0, 3),
        )
        .unwrap();
        assert_eq!(out, vec![vec![15.0], vec![40.0]]);
    }

    #[test]
    fn partial_overlap_is_pro_rata() {
        // One delta of 10 over [0, 1); interval [0.25, 0.5) gets a quarter of it.
        let out = map_series(
            &series(&[0.0], &[1.0], &[10.0]),
            &[MapRule::Sum],
            &[
                Interval {
                    start: 0.25,
                    end: 0.5,
                },
                Interval {
                    start: 0.9,
                    end: 1.4,
                },
            ],
        )
        .unwrap();
        assert!((out[0][0] - 2.5).abs() < 1e-6);
        assert!((out[1][0] - 1.0).abs() < 1e-6);
    }

    #[test]
    fn mean_extends_first_and_last_rows() {
        // Signal: 2 before t=1 (first row extended), 4 from 1 on (last row extended).
        let start = [1.0, 2.0];
        let end = contiguous_ends(&start, 1.0);
        let out = map_series(
            &series(&start, &end, &[2.0, 4.0]),
            &[MapRule::Mean],
            &[Interval {
                start: 0.0,
                end: 4.0,
            }],
        )
        .unwrap();
        // (2 s * 2 + 2 s * 4) / 4 s = 3
        assert!((out[0][0] - 3.0).abs() < 1e-6);
    }

    #[test]
    fn hold_uses_tolerance_and_first_row_before_start() {
        let start = [0.1005, 0.3];
        let end = contiguous_ends(&start, 0.2);
        let out = map_series(
            &series(&start, &end, &[7.0, 8.0]),
            &[MapRule::Hold],
            &frame_intervals(10.0, 5),
        )
        .unwrap();
        // frame 0 (t=0) is before the first row: first row; frame 1 (t=0.1) sees the row at
        // 0.1005 (within 1 ms); frame 3 (t=0.3) sees the second row.
        assert_eq!(out, vec![vec![7.0], vec![7.0], vec![7.0], vec![8.0]]);
    }

    #[test]
    fn invalid_series_is_refused() {
        let err = map_series(
            &series(&[0.0, 0.0], &[0.0, 1.0], &[1.0, 2.0]),
            &[MapRule::Sum],
            &[],
        )
        .unwrap_err();
        assert!(
            matches!(err, ActionsError::BadSeriesRow { row: 0, .. }),
            "{err}"
        );
        let err = map_series(&series(&[0.0], &[1.0], &[1.0]), &[], &[]).unwrap_err();
        assert!(
            matches!(err, ActionsError::RuleCount { rules: 0, dims: 1 }),
            "{err}"
        );
    }

    #[test]
    fn median_step_of_even_and_odd_counts() {
        assert_eq!(median_step(&[0.0]), None);
        assert_eq!(median_step(&[0.0, 1.0, 3.0]), Some(1.5));
        assert_eq!(median_step(&[0.0, 1.0, 3.0, 4.0]), Some(1.0));
    }
}
