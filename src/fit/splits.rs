//! Dealing labelled clips into train, calib and holdout.
//!
//! Split conformal intervals are guaranteed only for clips exchangeable with
//! the calibration clips. With a plain shuffle and few labelled clips, the
//! fastest-moving clips can all land outside `calib`, and their intervals then
//! rest on extrapolation. [`SplitBy::Motion`] (the default) orders the
//! labelled clips by motion size and takes the calib and the holdout clips at
//! evenly spaced ranks from a seeded start (systematic sampling over a sorted
//! list, a form of stratified sampling; Cochran, "Sampling Techniques", ch. 8,
//! cited from memory), so both sets span the motion range of the labelled
//! clips. [`SplitBy::Random`] is the seeded shuffle.

use serde::{Deserialize, Serialize};

use super::data::{Split, SplitCounts, Standardisation};
use crate::model::Rng;

/// How labelled clips are dealt into train, calib and holdout.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum SplitBy {
    /// Ordered by motion size, calib and holdout at evenly spaced ranks.
    #[default]
    Motion,
    /// A seeded shuffle of the labelled clips.
    Random,
}

/// One number per clip for ordering by motion: the mean over dimensions of the
/// clip's mean absolute recorded action, each dimension divided by its
/// standard deviation over all labelled transitions (so no dimension's units
/// dominate; a constant dimension keeps 1, as in [`Standardisation`]).
/// `clips[i]` holds clip i's action rows.
pub fn motion_scores(clips: &[&[Vec<f32>]], dims: &[String]) -> Vec<f64> {
    let all_rows = clips.iter().flat_map(|c| c.iter().cloned());
    let spread = Standardisation::fit(dims, all_rows).std;
    clips
        .iter()
        .map(|rows| {
            let size =
                crate::label::motion_range::motion_size(rows.iter().map(Vec::as_slice), dims.len());
            size.iter().zip(&spread).map(|(s, d)| s / d).sum::<f64>() / dims.len().max(1) as f64
        })
        .collect()
}

/// How `n` clips of held-out sets split: calib and holdout only, in the
/// ratio of the two fractions (the calib share rounded to nearest).
pub fn held_out_counts(n: usize, calib: f64, holdout: f64) -> SplitCounts {
    let c = ((n as f64 * calib / (calib + holdout)).round() as usize).min(n);
    SplitCounts {
        train: 0,
        calib: c,
        holdout: n - c,
    }
}

/// The split of each of `scores.len()` labelled clips (given in a fixed
/// order), `counts` of each, dealt by `by` from `seed` and the random stream
/// named `stream` (one per group of clips dealt, so that one group's dealing
/// does not move another's).
pub fn assign(
    scores: &[f64],
    counts: SplitCounts,
    by: SplitBy,
    seed: u64,
    stream: &str,
) -> Vec<Split> {
    let n = scores.len();
    let mut rng = Rng::for_name(seed, stream);
    let mut out = vec![Split::Train; n];
    match by {
        SplitBy::Random => {
            let mut order: Vec<usize> = (0..n).collect();
            rng.shuffle(&mut order);
            for (rank, &i) in order.iter().enumerate() {
                out[i] = if rank < counts.calib {
                    Split::Calib
                } else if rank < counts.calib + counts.holdout {
                    Split::Holdout
                } else {
                    Split::Train
                };
            }
        }
        SplitBy::Motion => {
            // Ranks by score; ties keep the given order.
            let mut order: Vec<usize> = (0..n).collect();
            order.sort_by(|&a, &b| scores[a].total_cmp(&scores[b]).then(a.cmp(&b)));
            let mut taken = vec![false; n];
            for (split, k) in [
                (Split::Calib, counts.calib),
                (Split::Holdout, counts.holdout),
            ] {
                let start = rng.uniform();
                for j in 0..k {
                    let ideal = ((j as f64 + start) * n as f64 / k as f64) as usize;
                    let rank = nearest_free(&taken, ideal.min(n - 1));
                    taken[rank] = true;
                    out[order[rank]] = split;
                }
            }
        }
    }
    out
}

/// The free rank nearest `ideal` (the lower one on a tie).
fn nearest_free(taken: &[bool], ideal: usize) -> usize {
    (0..taken.len())
        .flat_map(|step| [ideal.checked_sub(step), Some(ideal + step)])
        .flatten()
        .find(|&r| r < taken.len() && !taken[r])
        .expect("fewer calib + holdout clips than labelled clips")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn counts(train: usize, calib: usize, holdout: usize) -> SplitCounts {
        SplitCounts {
            train,
            calib,
            holdout,
        }
    }

    /// 40 clips' worth of splits (24 / 8 / 8) on the fit stage's stream.
    fn deal_24_8_8(scores: &[f64], by: SplitBy, seed: u64) -> Vec<Split> {
        assign(scores, counts(24, 8, 8), by, seed, "fit.splits")
    }

    fn tally(s: &[Split]) -> (usize, usize, usize) {
        let c = |x| s.iter().filter(|&&v| v == x).count();
        (c(Split::Train), c(Split::Calib), c(Split::Holdout))
    }

    #[test]
    fn both_methods_give_the_counts_and_repeat_per_seed() {
        let scores: Vec<f64> = (0..40).map(|i| ((i * 17) % 40) as f64).collect();
        for by in [SplitBy::Motion, SplitBy::Random] {
            for seed in 0..20 {
                let a = deal_24_8_8(&scores, by, seed);
                assert_eq!(tally(&a), (24, 8, 8), "{by:?} seed {seed}");
                assert_eq!(a, deal_24_8_8(&scores, by, seed));
            }
        }
        let small = assign(
            &[1.0, 2.0, 3.0],
            counts(1, 1, 1),
            SplitBy::Motion,
            3,
            "fit.splits",
        );
        assert_eq!(tally(&small), (1, 1, 1));
    }

    #[test]
    fn motion_splits_span_the_range_in_every_block() {
        // 40 clips, scores 0..40: with 8 calib clips at spacing 5, each block
        // of 5 consecutive ranks holds exactly one calib clip, for any seed;
        // holdout likewise (unless a calib clip took its rank, when it moves
        // to the nearest free one).
        let scores: Vec<f64> = (0..40).map(|i| (39 - i) as f64).collect();
        for seed in 0..50 {
            let a = deal_24_8_8(&scores, SplitBy::Motion, seed);
            let by_rank: Vec<Split> = (0..40).map(|r| a[39 - r]).collect();
            for block in by_rank.chunks(5) {
                let calib = block.iter().filter(|&&s| s == Split::Calib).count();
                assert_eq!(calib, 1, "seed {seed}: {by_rank:?}");
            }
            let top = by_rank[30..].iter().filter(|&&s| s != Split::Train).count();
            assert!(top >= 2, "seed {seed}: fastest ranks get calib and holdout");
        }
    }

    #[test]
    fn a_shuffle_can_leave_the_fastest_quarter_without_calib_clips() {
        // The reason for the motion method: over 200 seeds, a random split of
        // 40 clips puts no calib clip among the 10 fastest in some of them
        // (hypergeometric: P = C(30,8)/C(40,8), about 7.6%).
        let scores: Vec<f64> = (0..40).map(f64::from).collect();
        let misses = (0..200)
            .filter(|&seed| {
                let a = deal_24_8_8(&scores, SplitBy::Random, seed);
                a[30..].iter().all(|&s| s != Split::Calib)
            })
            .count();
        assert!(misses > 0 && misses < 40, "{misses}");
    }

    #[test]
    fn held_out_clips_go_to_calib_and_holdout_in_the_fractions_ratio() {
        assert_eq!(tally_counts(held_out_counts(40, 0.2, 0.2)), (0, 20, 20));
        assert_eq!(tally_counts(held_out_counts(10, 0.1, 0.3)), (0, 3, 7));
        assert_eq!(tally_counts(held_out_counts(1, 0.2, 0.2)), (0, 1, 0));
        let scores: Vec<f64> = (0..40).map(|i| ((i * 7) % 40) as f64).collect();
        for by in [SplitBy::Motion, SplitBy::Random] {
            let a = assign(&scores, held_out_counts(40, 0.2, 0.2), by, 7, "other");
            assert_eq!(tally(&a), (0, 20, 20), "{by:?}");
        }
        // Motion dealing alternates along the ranks: each pair of neighbouring
        // ranks holds one calib and one holdout clip.
        let sorted: Vec<f64> = (0..40).map(f64::from).collect();
        let a = assign(
            &sorted,
            held_out_counts(40, 0.2, 0.2),
            SplitBy::Motion,
            7,
            "x",
        );
        for pair in a.chunks(2) {
            assert_ne!(pair[0], pair[1], "{a:?}");
        }
    }

    fn tally_counts(c: SplitCounts) -> (usize, usize, usize) {
        (c.train, c.calib, c.holdout)
    }

    #[test]
    fn scores_are_scale_free_per_dimension() {
        let a: Vec<Vec<f32>> = vec![vec![1.0, 100.0], vec![-1.0, -100.0]];
        let b: Vec<Vec<f32>> = vec![vec![2.0, 200.0], vec![-2.0, -200.0]];
        let dims = ["x".to_string(), "y".to_string()];
        let s = motion_scores(&[&a, &b], &dims);
        let scaled_a: Vec<Vec<f32>> = a.iter().map(|r| vec![r[0], r[1] / 100.0]).collect();
        let scaled_b: Vec<Vec<f32>> = b.iter().map(|r| vec![r[0], r[1] / 100.0]).collect();
        let t = motion_scores(&[&scaled_a, &scaled_b], &dims);
        assert!((s[0] - t[0]).abs() < 1e-9 && (s[1] - t[1]).abs() < 1e-9);
        assert!(s[1] > s[0]);
    }
}
