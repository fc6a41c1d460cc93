//! Evaluation: how well a score separates in-distribution vectors from
//! known outliers.

/// Area under the ROC curve for telling `outliers` from `inliers` with a
/// score where higher = more anomalous: the probability that a random
/// outlier scores above a random inlier, ties counting one half. Equal to
/// the Mann-Whitney U statistic divided by n_in * n_out.
pub fn auroc(inliers: &[f64], outliers: &[f64]) -> f64 {
    let mut all: Vec<(f64, bool)> =
        inliers.iter().map(|&v| (v, false)).chain(outliers.iter().map(|&v| (v, true))).collect();
    all.sort_by(|a, b| a.0.total_cmp(&b.0));
    // Sum of the (mid-)ranks of the outliers.
    let mut rank_sum = 0.0;
    let mut i = 0;
    while i < all.len() {
        let mut j = i;
        while j < all.len() && all[j].0 == all[i].0 {
            j += 1;
        }
        let mid_rank = (i + j + 1) as f64 / 2.0;
        rank_sum += mid_rank * all[i..j].iter().filter(|e| e.1).count() as f64;
        i = j;
    }
    let (n_in, n_out) = (inliers.len() as f64, outliers.len() as f64);
    (rank_sum - n_out * (n_out + 1.0) / 2.0) / (n_in * n_out)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// By definition: the share of (inlier, outlier) pairs ranked right,
    /// ties one half, counted pair by pair.
    #[test]
    fn auroc_counts_pairs_with_ties_as_half() {
        let inl = [0.1, 0.4, 0.4, 0.8, 0.3];
        let out = [0.4, 0.9, 0.35, 0.8];
        let mut pairs = 0.0;
        for &o in &out {
            for &i in &inl {
                pairs += if o > i {
                    1.0
                } else if o == i {
                    0.5
                } else {
                    0.0
                };
            }
        }
        assert!((auroc(&inl, &out) - pairs / 20.0).abs() < 1e-12);
        assert_eq!(auroc(&[0.0, 1.0], &[2.0, 3.0]), 1.0);
        assert_eq!(auroc(&[2.0, 3.0], &[0.0, 1.0]), 0.0);
    }
}
