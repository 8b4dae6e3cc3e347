//! Registration of one frame's stars onto a reference frame's: triangle (asterism)
//! invariants (Groth 1986, AJ 91, 1244; Valdes et al. 1995, PASP 107, 1119) vote for
//! star correspondences, a consensus search over pairs of them finds a similarity
//! transform (rotation, scale, shift: dithers, drift, field rotation and the 180° turn of
//! a meridian flip are all of this kind), and least squares on every matched star
//! refines it to an affine transform with its residual RMS. Pure.

use crate::linalg::Cholesky;
use crate::pairs::nearest_pairs;

/// A frame placed on its group's reference frame.
#[derive(Debug, Clone, Default, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Placement {
    /// The id of the reference frame's record it was made on (`night::judge::Held::id`):
    /// the placement holds while that record is the group's reference. A rewritten
    /// reference is a new record, so what was placed on its old stars names another id.
    pub reference: i64,
    pub registered: bool,
    /// Frame → reference transform [a00, a01, a10, a11, t0, t1] in FITS pixels.
    pub transform: Option<[f64; 6]>,
    pub rms_px: Option<f64>,
    pub matched: usize,
    /// Median magnitude difference of the stars with SNR > 20 in both frames (this frame
    /// minus the reference; positive: less light came through). Needs three such stars.
    pub offset_mag: Option<f64>,
}

impl Placement {
    pub fn affine(&self) -> Option<Affine> {
        self.transform.map(|t| Affine {
            a: [[t[0], t[1]], [t[2], t[3]]],
            t: [t[4], t[5]],
        })
    }
}

/// p_ref = A · p + t, positions in FITS pixels.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Affine {
    pub a: [[f64; 2]; 2],
    pub t: [f64; 2],
}

impl Affine {
    pub const IDENTITY: Affine = Affine {
        a: [[1.0, 0.0], [0.0, 1.0]],
        t: [0.0, 0.0],
    };

    pub fn apply(&self, p: (f64, f64)) -> (f64, f64) {
        (
            self.a[0][0] * p.0 + self.a[0][1] * p.1 + self.t[0],
            self.a[1][0] * p.0 + self.a[1][1] * p.1 + self.t[1],
        )
    }

    pub fn inverse(&self) -> Option<Affine> {
        let det = self.a[0][0] * self.a[1][1] - self.a[0][1] * self.a[1][0];
        if det.abs() < 1e-12 {
            return None;
        }
        let inv = [
            [self.a[1][1] / det, -self.a[0][1] / det],
            [-self.a[1][0] / det, self.a[0][0] / det],
        ];
        let t = [
            -(inv[0][0] * self.t[0] + inv[0][1] * self.t[1]),
            -(inv[1][0] * self.t[0] + inv[1][1] * self.t[1]),
        ];
        Some(Affine { a: inv, t })
    }

    /// Rotation of the transform, degrees.
    pub fn rotation_deg(&self) -> f64 {
        self.a[1][0].atan2(self.a[0][0]).to_degrees()
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct Registration {
    pub transform: Affine,
    /// RMS distance between matched stars after the transform, pixels.
    pub rms_px: f64,
    pub matched: usize,
}

#[derive(Debug, Clone, Copy)]
struct Triangle {
    /// Invariants: middle over longest side, shortest over longest side.
    inv: (f64, f64),
    /// Vertices ordered: opposite the longest, the middle, the shortest side.
    v: [usize; 3],
}

fn triangles(points: &[(f64, f64)]) -> Vec<Triangle> {
    let n = points.len();
    let d = |i: usize, j: usize| (points[i].0 - points[j].0).hypot(points[i].1 - points[j].1);
    let mut seen = std::collections::HashSet::new();
    let mut out = Vec::new();
    for i in 0..n {
        // Each star with pairs of its nearest neighbours: local triangles survive partial
        // overlap between frames better than triangles spanning the whole field.
        let mut near: Vec<usize> = (0..n).filter(|&j| j != i).collect();
        near.sort_by(|&a, &b| d(i, a).total_cmp(&d(i, b)));
        near.truncate(7);
        for (ai, &j) in near.iter().enumerate() {
            for &k in &near[ai + 1..] {
                let mut key = [i, j, k];
                key.sort_unstable();
                if !seen.insert(key) {
                    continue;
                }
                // Side opposite each vertex.
                let mut sides = [(d(j, k), i), (d(i, k), j), (d(i, j), k)];
                sides.sort_by(|a, b| b.0.total_cmp(&a.0));
                if sides[0].0 < 1e-6 || sides[2].0 < 3.0 {
                    continue;
                }
                out.push(Triangle {
                    inv: (sides[1].0 / sides[0].0, sides[2].0 / sides[0].0),
                    v: [sides[0].1, sides[1].1, sides[2].1],
                });
            }
        }
    }
    out.sort_by(|a, b| a.inv.0.total_cmp(&b.inv.0));
    out
}

/// Similarity transform from two point pairs (frame → reference).
fn similarity(p1: (f64, f64), p2: (f64, f64), q1: (f64, f64), q2: (f64, f64)) -> Option<Affine> {
    let (dpx, dpy) = (p2.0 - p1.0, p2.1 - p1.1);
    let (dqx, dqy) = (q2.0 - q1.0, q2.1 - q1.1);
    let n = dpx * dpx + dpy * dpy;
    if n < 1e-9 {
        return None;
    }
    // Complex ratio (dq / dp) = a + ib.
    let a = (dqx * dpx + dqy * dpy) / n;
    let b = (dqy * dpx - dqx * dpy) / n;
    let t = [q1.0 - (a * p1.0 - b * p1.1), q1.1 - (b * p1.0 + a * p1.1)];
    Some(Affine {
        a: [[a, -b], [b, a]],
        t,
    })
}

/// A matched pair: (frame position, reference position, weight).
type Pair = ((f64, f64), (f64, f64), f64);

/// Weighted least-squares affine transform from matched pairs.
fn fit_affine(pairs: &[Pair]) -> Option<Affine> {
    if pairs.len() < 3 {
        return None;
    }
    // Normal equations for [x y 1] · [a00 a01 t0]ᵀ = x', likewise for y'.
    let mut m = [[0.0; 3]; 3];
    let mut bx = [0.0; 3];
    let mut by = [0.0; 3];
    for &((x, y), (u, v), w) in pairs {
        let r = [x, y, 1.0];
        for i in 0..3 {
            for j in 0..3 {
                m[i][j] += w * r[i] * r[j];
            }
            bx[i] += w * r[i] * u;
            by[i] += w * r[i] * v;
        }
    }
    let normal = Cholesky::new(&m)?;
    let (sx, sy) = (normal.solve(&bx), normal.solve(&by));
    Some(Affine {
        a: [[sx[0], sx[1]], [sy[0], sy[1]]],
        t: [sx[2], sy[2]],
    })
}

/// What registration needs of a star: its FITS position, its flux (for choosing the
/// brightest) and its SNR (a centroid's error goes as 1/SNR, so the fit weighs each match
/// by 1 / (1/SNR_frame² + 1/SNR_reference²)).
pub trait Placed {
    fn xy(&self) -> (f64, f64);
    fn flux(&self) -> f64;
    fn snr(&self) -> f64;
}

/// A bare point with what registration needs (catalogue stars, tests).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Point {
    pub x: f64,
    pub y: f64,
    pub flux: f64,
    pub snr: f64,
}

/// [`Placed`] for types that hold it in fields `x`, `y`, `flux` and `snr`.
macro_rules! placed_by_fields {
    ($($t:ty),*) => {$(
        impl Placed for $t {
            fn xy(&self) -> (f64, f64) {
                (self.x, self.y)
            }
            fn flux(&self) -> f64 {
                self.flux
            }
            fn snr(&self) -> f64 {
                self.snr
            }
        }
    )*};
}

placed_by_fields!(Point, crate::record::StarRecord);

/// Register `frame` stars onto `reference` stars. `None` when no consistent transform is
/// found (clouds, another target).
pub fn register<S: Placed>(reference: &[S], frame: &[S]) -> Option<Registration> {
    register_brightest(reference, frame, 40)
}

/// [`register`] with the pattern search on the `n` brightest stars of each list.
pub fn register_brightest<S: Placed>(
    reference: &[S],
    frame: &[S],
    n: usize,
) -> Option<Registration> {
    let brightest = |stars: &[S], n: usize| -> Vec<(f64, f64)> {
        let mut s: Vec<&S> = stars.iter().collect();
        s.sort_by(|a, b| b.flux().total_cmp(&a.flux()));
        s.into_iter().take(n).map(|p| p.xy()).collect()
    };
    let rb = brightest(reference, n);
    let fb = brightest(frame, n);
    if rb.len() < 4 || fb.len() < 4 {
        return None;
    }
    let rt = triangles(&rb);
    let ft = triangles(&fb);
    let eps = 0.008;
    let mut votes = vec![vec![0u32; rb.len()]; fb.len()];
    for tri in &ft {
        let lo = rt.partition_point(|r| r.inv.0 < tri.inv.0 - eps);
        for r in &rt[lo..] {
            if r.inv.0 > tri.inv.0 + eps {
                break;
            }
            if (r.inv.1 - tri.inv.1).abs() <= eps {
                for k in 0..3 {
                    votes[tri.v[k]][r.v[k]] += 1;
                }
            }
        }
    }
    // The strongest correspondences.
    let mut pairs: Vec<(usize, usize, u32)> = votes
        .iter()
        .enumerate()
        .filter_map(|(i, row)| {
            let (j, &v) = row.iter().enumerate().max_by_key(|(_, v)| **v)?;
            (v >= 2).then_some((i, j, v))
        })
        .collect();
    pairs.sort_by_key(|p| std::cmp::Reverse(p.2));
    pairs.truncate(25);
    if pairs.len() < 2 {
        return None;
    }
    // Consensus over every pair of correspondences (deterministic).
    let mut best: Option<(usize, Affine)> = None;
    for a in 0..pairs.len() {
        for b in a + 1..pairs.len() {
            let (fa, ra, _) = pairs[a];
            let (fb_, rb_, _) = pairs[b];
            let Some(t) = similarity(fb[fa], fb[fb_], rb[ra], rb[rb_]) else {
                continue;
            };
            let scale = t.a[0][0].hypot(t.a[1][0]);
            if !(0.8..=1.25).contains(&scale) {
                continue;
            }
            let inliers = pairs
                .iter()
                .filter(|&&(f, r, _)| {
                    let q = t.apply(fb[f]);
                    (q.0 - rb[r].0).hypot(q.1 - rb[r].1) < 2.0
                })
                .count();
            if best.as_ref().is_none_or(|(n, _)| inliers > *n) {
                best = Some((inliers, t));
            }
        }
    }
    let (inliers, mut t) = best?;
    if inliers < 3 {
        return None;
    }
    // Refine on all stars: match, fit affine, repeat with a tighter tolerance.
    let fp: Vec<(f64, f64)> = frame.iter().map(|p| p.xy()).collect();
    let rp: Vec<(f64, f64)> = reference.iter().map(|p| p.xy()).collect();
    let rp_all: Vec<Option<(f64, f64)>> = rp.iter().copied().map(Some).collect();
    let weight = |i: usize, j: usize| {
        let (a, b) = (frame[i].snr().max(1.0), reference[j].snr().max(1.0));
        1.0 / (1.0 / (a * a) + 1.0 / (b * b))
    };
    let mut matched = Vec::new();
    for tol in [3.0, 1.5, 1.0] {
        let moved: Vec<(f64, f64)> = fp.iter().map(|&p| t.apply(p)).collect();
        matched = nearest_pairs(&moved, &rp_all, tol);
        if matched.len() < 6 {
            return None;
        }
        let data: Vec<Pair> = matched
            .iter()
            .map(|&(i, j, _)| (fp[i], rp[j], weight(i, j)))
            .collect();
        t = fit_affine(&data)?;
    }
    let sq: f64 = matched
        .iter()
        .map(|&(i, j, _)| {
            let q = t.apply(fp[i]);
            (q.0 - rp[j].0).powi(2) + (q.1 - rp[j].1).powi(2)
        })
        .sum();
    Some(Registration {
        transform: t,
        rms_px: (sq / matched.len() as f64).sqrt(),
        matched: matched.len(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    fn star(x: f64, y: f64, flux: f64) -> Point {
        Point {
            x,
            y,
            flux,
            snr: flux / 10.0,
        }
    }

    fn field() -> Vec<Point> {
        // A deterministic scatter of 60 stars.
        (0..60)
            .map(|i| {
                let f = i as f64;
                star(
                    (f * 97.31).rem_euclid(900.0) + 50.0,
                    (f * 53.77 + f * f * 0.7).rem_euclid(700.0) + 40.0,
                    1000.0 + (f * 37.0).rem_euclid(500.0),
                )
            })
            .collect()
    }

    #[test]
    fn recovers_a_known_shift_rotation_and_meridian_flip() {
        let reference = field();
        for (angle, shift) in [
            (0.0f64, (12.5, -7.25)),
            (1.5, (-20.0, 3.0)),
            (180.0, (8.0, 15.0)),
        ] {
            let truth = {
                let (s, c) = angle.to_radians().sin_cos();
                Affine {
                    a: [[c, -s], [s, c]],
                    t: [shift.0, shift.1],
                }
            };
            let inv = truth.inverse().unwrap();
            // The frame sees reference stars through the inverse; drop a few, add a few.
            let mut frame: Vec<Point> = reference
                .iter()
                .skip(3)
                .map(|s| {
                    let p = inv.apply((s.x, s.y));
                    star(p.0, p.1, s.flux)
                })
                .collect();
            frame.push(star(500.0, 500.0, 1200.0));
            let r = register(&reference, &frame).expect("registered");
            assert!(r.rms_px < 1e-6, "{angle}: rms {}", r.rms_px);
            for k in 0..2 {
                for l in 0..2 {
                    assert!((r.transform.a[k][l] - truth.a[k][l]).abs() < 1e-9);
                }
                assert!((r.transform.t[k] - truth.t[k]).abs() < 1e-6);
            }
            assert_eq!(r.matched, 57);
        }
    }

    #[test]
    fn unrelated_fields_do_not_register() {
        let reference = field();
        let other: Vec<Point> = (0..60)
            .map(|i| {
                let f = i as f64;
                star(
                    (f * 71.9).rem_euclid(800.0),
                    (f * 31.3 + f * f * 1.3).rem_euclid(600.0),
                    900.0 + f,
                )
            })
            .collect();
        assert!(register(&reference, &other).is_none());
    }
}
