//! The motion range the calibration clips cover. Split conformal intervals
//! are guaranteed only for clips exchangeable with the `calib` clips; a clip
//! that moves more than every calib clip (per dimension, the mean absolute
//! estimated action over its transitions) lies outside what calibration saw,
//! and its intervals may cover less than nominal. The label stage records the
//! range, counts such clips per set and measures holdout coverage on the
//! clips inside it.
//!
//! Estimated, not recorded, actions define a clip's motion size, so that
//! unlabelled clips are measured the same way as calib clips.

/// Per dimension, the mean absolute value over `rows` (one row per
/// transition, `dims` values each); zeros when there are no rows.
pub fn motion_size<'a, T>(rows: impl IntoIterator<Item = &'a [T]>, dims: usize) -> Vec<f64>
where
    T: Copy + Into<f64> + 'a,
{
    let mut sum = vec![0.0f64; dims];
    let mut n = 0usize;
    for row in rows {
        for (s, v) in sum.iter_mut().zip(row) {
            *s += (*v).into().abs();
        }
        n += 1;
    }
    if n > 0 {
        sum.iter_mut().for_each(|s| *s /= n as f64);
    }
    sum
}

/// Per dimension, the largest of the calib clips' motion sizes.
pub fn range_of(sizes: &[Vec<f64>], dims: usize) -> Vec<f64> {
    (0..dims)
        .map(|d| sizes.iter().map(|s| s[d]).fold(0.0, f64::max))
        .collect()
}

/// Relative margin below which a size counts as inside the range: the range
/// is read back from `calibration.json`, and serde_json's default float
/// parser can land one unit in the last place off, so the calibration clip
/// that sets the range could otherwise read as beyond it.
const ROUNDING_MARGIN: f64 = 1e-6;

/// The dimensions in which a clip of motion `size` moves more than `range`
/// (none when no range was recorded).
pub fn beyond(size: &[f64], range: &[f64]) -> Vec<usize> {
    size.iter()
        .zip(range)
        .enumerate()
        .filter(|(_, (s, r))| **s > **r * (1.0 + ROUNDING_MARGIN))
        .map(|(d, _)| d)
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_clip_that_sets_the_range_is_not_beyond_it_once_read_back() {
        // Seen on the demo: the range written to calibration.json and parsed
        // back by serde_json (without its `float_roundtrip` feature) came
        // back one unit in the last place below the calib clip's own size.
        let written = 0.391_096_649_777_329_16_f64;
        let read: f64 = serde_json::from_str(&serde_json::to_string(&written).unwrap()).unwrap();
        assert!(
            beyond(&[written], &[read]).is_empty(),
            "{written} vs {read}"
        );
        assert_eq!(beyond(&[written * 1.001], &[read]), [0]);
    }

    #[test]
    fn size_range_and_beyond() {
        let rows: Vec<Vec<f32>> = vec![vec![1.0, -2.0], vec![-3.0, 0.0]];
        let size = motion_size(rows.iter().map(Vec::as_slice), 2);
        assert_eq!(size, vec![2.0, 1.0]);
        assert_eq!(motion_size(std::iter::empty::<&[f64]>(), 2), vec![0.0, 0.0]);
        let range = range_of(&[vec![0.5, 1.5], vec![2.5, 0.2]], 2);
        assert_eq!(range, vec![2.5, 1.5]);
        assert!(beyond(&size, &range).is_empty());
        assert_eq!(beyond(&[3.0, 1.0], &range), vec![0]);
        assert!(beyond(&[3.0, 9.0], &[]).is_empty());
    }
}
