//! Where the search starts: the unit's top-activating reference samples (grouped into one
//! cluster per facet), the box centre and uniform random points.
//!
//! Facets follow A. Nguyen, J. Yosinski & J. Clune, "Multifaceted feature visualization"
//! (2016): the samples that drive a unit most are clustered, and each cluster seeds one
//! facet. Here the `max(4 K, restarts)` top samples are clustered by k-means (Lloyd's
//! algorithm from a k-means++ seeding, D. Arthur & S. Vassilvitskii 2007, with a seeded
//! generator) in box-width units, and the clusters are ordered by their best sample, so
//! facet 0 always holds the unit's single best sample.

use ndarray::{ArrayView1, ArrayView2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// Lloyd iterations of the k-means (enough for a few dozen points to settle).
const KMEANS_ITERATIONS: usize = 20;

/// Indices of the `m` rows with the largest finite `z`, best first (ties to the lower row).
pub(super) fn top_rows(z: ArrayView1<f32>, m: usize) -> Vec<usize> {
    let mut idx: Vec<usize> = (0..z.len()).filter(|&r| z[r].is_finite()).collect();
    idx.sort_by(|&a, &b| z[b].total_cmp(&z[a]).then(a.cmp(&b)));
    idx.truncate(m);
    idx
}

/// Squared distance in box-width units.
fn dist2(a: ArrayView1<f32>, b: &[f64], inv_width: &[f64]) -> f64 {
    a.iter()
        .zip(b)
        .zip(inv_width)
        .map(|((x, c), w)| ((f64::from(*x) - c) * w).powi(2))
        .sum()
}

/// Splits `members` (row indices of `points: [rows, inputs]`, best first) into at most `k`
/// clusters by seeded k-means; returns the clusters as lists of members in the input order,
/// ordered by their first (best) member. Fewer than `k` clusters come back when there are
/// fewer distinct points.
pub(super) fn cluster(
    points: ArrayView2<f32>,
    members: &[usize],
    k: usize,
    width: &[f32],
    seed: u64,
) -> Vec<Vec<usize>> {
    if members.is_empty() || k == 0 {
        return Vec::new();
    }
    if k == 1 {
        return vec![members.to_vec()];
    }
    let inv_width: Vec<f64> = width
        .iter()
        .map(|w| if *w > 0.0 { 1.0 / f64::from(*w) } else { 0.0 })
        .collect();
    let row = |i: usize| points.row(members[i]);
    let to_f64 = |i: usize| -> Vec<f64> { row(i).iter().map(|v| f64::from(*v)).collect() };
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    // k-means++: the first centre is the best sample, the next ones drawn with probability
    // proportional to the squared distance to the nearest centre chosen so far.
    let mut centres: Vec<Vec<f64>> = vec![to_f64(0)];
    let mut nearest: Vec<f64> = (0..members.len())
        .map(|i| dist2(row(i), &centres[0], &inv_width))
        .collect();
    while centres.len() < k {
        let total: f64 = nearest.iter().sum();
        if total <= 0.0 {
            break; // every point coincides with a centre
        }
        let mut pick = rng.random_range(0.0..total);
        let mut chosen = members.len() - 1;
        for (i, d) in nearest.iter().enumerate() {
            if pick < *d {
                chosen = i;
                break;
            }
            pick -= d;
        }
        centres.push(to_f64(chosen));
        let c = centres.len() - 1;
        for (i, d) in nearest.iter_mut().enumerate() {
            *d = d.min(dist2(row(i), &centres[c], &inv_width));
        }
    }
    let mut assign = vec![0usize; members.len()];
    for _ in 0..KMEANS_ITERATIONS {
        let mut changed = false;
        for (i, a) in assign.iter_mut().enumerate() {
            let best = (0..centres.len())
                .min_by(|&x, &y| {
                    dist2(row(i), &centres[x], &inv_width).total_cmp(&dist2(
                        row(i),
                        &centres[y],
                        &inv_width,
                    ))
                })
                .unwrap_or(0);
            if best != *a {
                *a = best;
                changed = true;
            }
        }
        for (c, centre) in centres.iter_mut().enumerate() {
            let mine: Vec<usize> = (0..members.len()).filter(|&i| assign[i] == c).collect();
            if mine.is_empty() {
                continue;
            }
            centre.iter_mut().for_each(|v| *v = 0.0);
            for &i in &mine {
                for (v, x) in centre.iter_mut().zip(row(i)) {
                    *v += f64::from(*x);
                }
            }
            centre.iter_mut().for_each(|v| *v /= mine.len() as f64);
        }
        if !changed {
            break;
        }
    }
    let mut clusters: Vec<Vec<usize>> = (0..centres.len())
        .map(|c| {
            (0..members.len())
                .filter(|&i| assign[i] == c)
                .map(|i| members[i])
                .collect::<Vec<usize>>()
        })
        .filter(|v: &Vec<usize>| !v.is_empty())
        .collect();
    // Members keep the best-first order, so a cluster's first member is its best; order
    // the clusters by the rank of that member.
    let rank = |r: usize| members.iter().position(|&m| m == r).unwrap_or(usize::MAX);
    clusters.sort_by_key(|c| rank(c[0]));
    clusters
}

/// The starts of one (unit, facet) group, `restarts` points: the group's data starts
/// (up to `ceil(restarts / 2)` of `data`, best first), then the box centre, then uniform
/// random points drawn from `rng`. Without data: the centre, then random points.
pub(super) fn group_starts(
    data: &[Vec<f32>],
    restarts: usize,
    low: &[f32],
    high: &[f32],
    rng: &mut ChaCha8Rng,
) -> Vec<Vec<f32>> {
    let d = data.len().min(restarts.div_ceil(2));
    let mut out: Vec<Vec<f32>> = data[..d].to_vec();
    if out.len() < restarts {
        out.push(low.iter().zip(high).map(|(l, h)| 0.5 * (l + h)).collect());
    }
    while out.len() < restarts {
        out.push(uniform_point(low, high, rng));
    }
    out
}

/// A uniform random point of the box `[low, high]` (an input of zero width stays at `low`).
pub(super) fn uniform_point(low: &[f32], high: &[f32], rng: &mut ChaCha8Rng) -> Vec<f32> {
    low.iter()
        .zip(high)
        .map(|(&l, &h)| if h > l { rng.random_range(l..=h) } else { l })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array1, array};

    #[test]
    fn top_rows_are_best_first_and_skip_nan() {
        let z = Array1::from(vec![1.0, f32::NAN, 3.0, 2.0, 3.0]);
        assert_eq!(top_rows(z.view(), 3), vec![2, 4, 3]);
        assert_eq!(top_rows(z.view(), 10), vec![2, 4, 3, 0]);
    }

    #[test]
    fn two_separated_groups_become_two_clusters() {
        // Two tight groups far apart: any k-means optimum with k = 2 separates them
        // (the within-cluster sum of squares of the split is far below any other split).
        let pts = array![
            [0.0f32, 0.0],
            [10.0, 10.0],
            [0.1, 0.0],
            [10.0, 9.9],
            [0.0, 0.1],
            [9.9, 10.0]
        ];
        let members = vec![1, 0, 2, 3, 4, 5];
        let c = cluster(pts.view(), &members, 2, &[1.0, 1.0], 3);
        assert_eq!(c.len(), 2);
        // Ordered by the best member (row 1 comes first in `members`).
        assert_eq!(c[0], vec![1, 3, 5]);
        assert_eq!(c[1], vec![0, 2, 4]);
        // Identical points give one cluster.
        let same = array![[1.0f32, 1.0], [1.0, 1.0]];
        assert_eq!(cluster(same.view(), &[0, 1], 2, &[1.0, 1.0], 0).len(), 1);
    }

    #[test]
    fn starts_put_data_first_then_centre_then_random() {
        let mut rng = ChaCha8Rng::seed_from_u64(0);
        let data = vec![vec![0.5f32, 0.5], vec![0.25, 0.75], vec![0.1, 0.1]];
        let s = group_starts(&data, 4, &[0.0, 0.0], &[1.0, 2.0], &mut rng);
        assert_eq!(s.len(), 4);
        assert_eq!(s[0], data[0]);
        assert_eq!(s[1], data[1]);
        assert_eq!(s[2], vec![0.5, 1.0]);
        assert!(s[3][0] >= 0.0 && s[3][0] <= 1.0 && s[3][1] >= 0.0 && s[3][1] <= 2.0);
        let s = group_starts(&[], 1, &[0.0], &[2.0], &mut rng);
        assert_eq!(s, vec![vec![1.0]]);
        // One restart with data: the best sample alone.
        let s = group_starts(&data, 1, &[0.0, 0.0], &[1.0, 2.0], &mut rng);
        assert_eq!(s, vec![data[0].clone()]);
    }
}
