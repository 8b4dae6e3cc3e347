//! Nearest pairs between two lists of points, a leaf: every pair closer than a
//! tolerance, taken nearest first, each point in at most one pair (a greedy assignment).
//! Registration pairs a frame's stars with its reference's, the sky fit a frame's stars
//! with a catalogue's; both ask this one question.
//!
//! The points are bucketed on a grid of cells at least the tolerance wide, so each point
//! looks only at the 3×3 cells around it: O(n) for points spread over a frame.

use std::collections::HashMap;

/// A pair: (index in `from`, index in `to`, distance).
pub type Pair = (usize, usize, f64);

/// Pairs of `from` and `to` points within `tol` of each other, nearest first, each
/// point used once. A `to` point that is `None` (off the frame, say) takes no part, nor
/// does a point beyond ±1e9 on either axis, or one that is not finite.
pub fn nearest_pairs(from: &[(f64, f64)], to: &[Option<(f64, f64)>], tol: f64) -> Vec<Pair> {
    let cell = tol.max(1.0) * 2.0;
    let key = |p: (f64, f64)| ((p.0 / cell).floor() as i64, (p.1 / cell).floor() as i64);
    let sane = |p: &(f64, f64)| p.0.abs() < 1e9 && p.1.abs() < 1e9;
    let mut grid: HashMap<(i64, i64), Vec<usize>> = HashMap::new();
    for (j, q) in to.iter().enumerate() {
        if let Some(q) = q.filter(sane) {
            grid.entry(key(q)).or_default().push(j);
        }
    }
    let mut cand = Vec::new();
    for (i, &p) in from.iter().enumerate().filter(|(_, p)| sane(p)) {
        let (cx, cy) = key(p);
        for gx in cx - 1..=cx + 1 {
            for gy in cy - 1..=cy + 1 {
                for &j in grid.get(&(gx, gy)).into_iter().flatten() {
                    let Some(q) = to[j] else { continue };
                    let d = (q.0 - p.0).hypot(q.1 - p.1);
                    if d <= tol {
                        cand.push((i, j, d));
                    }
                }
            }
        }
    }
    // A stable sort: among equal distances, the order found (by `from`, then cell).
    cand.sort_by(|a, b| a.2.total_cmp(&b.2));
    let mut used_from = vec![false; from.len()];
    let mut used_to = vec![false; to.len()];
    cand.retain(|&(i, j, _)| {
        if used_from[i] || used_to[j] {
            return false;
        }
        used_from[i] = true;
        used_to[j] = true;
        true
    });
    cand
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn each_point_goes_to_its_nearest_free_partner() {
        // `from` 0 is nearer to `to` 0 than `from` 1 is, so `from` 1 takes `to` 1.
        let from = [(10.0, 10.0), (10.5, 10.0), (50.0, 50.0)];
        let to = [
            Some((10.2, 10.0)),
            Some((11.0, 10.0)),
            None,
            Some((80.0, 80.0)),
        ];
        let pairs = nearest_pairs(&from, &to, 1.5);
        let ij: Vec<(usize, usize)> = pairs.iter().map(|&(i, j, _)| (i, j)).collect();
        assert_eq!(ij, [(0, 0), (1, 1)]);
        assert!((pairs[0].2 - 0.2).abs() < 1e-12);
        assert!((pairs[1].2 - 0.5).abs() < 1e-12);
    }

    #[test]
    fn finds_every_pair_a_brute_force_search_finds() {
        // Points on a jittered lattice, paired against a shifted copy: the grid must not
        // lose pairs that straddle its cells.
        let from: Vec<(f64, f64)> = (0..400)
            .map(|k| {
                let (i, j) = (f64::from(k % 20), f64::from(k / 20));
                (i * 7.3 + (j * 1.7).sin(), j * 6.1 + (i * 2.3).cos())
            })
            .collect();
        let to: Vec<Option<(f64, f64)>> =
            from.iter().map(|p| Some((p.0 + 0.9, p.1 - 0.8))).collect();
        for tol in [0.5, 1.0, 1.5, 4.0] {
            let mut brute: Vec<Pair> = Vec::new();
            for (i, p) in from.iter().enumerate() {
                for (j, q) in to.iter().enumerate() {
                    let q = q.unwrap();
                    let d = (q.0 - p.0).hypot(q.1 - p.1);
                    if d <= tol {
                        brute.push((i, j, d));
                    }
                }
            }
            brute.sort_by(|a, b| a.2.total_cmp(&b.2));
            let (mut uf, mut ut) = (vec![false; from.len()], vec![false; to.len()]);
            brute.retain(|&(i, j, _)| {
                let free = !uf[i] && !ut[j];
                if free {
                    uf[i] = true;
                    ut[j] = true;
                }
                free
            });
            let mut got = nearest_pairs(&from, &to, tol);
            got.sort_by_key(|&(i, j, _)| (i, j));
            brute.sort_by_key(|&(i, j, _)| (i, j));
            assert_eq!(got, brute, "tol {tol}");
        }
    }

    #[test]
    fn points_off_the_plane_take_no_part() {
        let from = [(f64::NAN, 0.0), (2e9, 2e9), (1.0, 1.0)];
        let to = [Some((2e9, 2e9)), Some((1.0, 1.0))];
        assert_eq!(nearest_pairs(&from, &to, 1.0), [(2, 1, 0.0)]);
    }
}
