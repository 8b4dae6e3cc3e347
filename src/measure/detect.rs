//! Source detection on a background-subtracted image: a matched filter (a normalised
//! Gaussian near the expected PSF), a threshold at k σ of the filtered noise, 8-connected
//! components, and deblending of close pairs by the depth of the saddle between peaks.
//! Pure: arrays in, candidate list out.
//! Longer than most modules: the filter, the thresholded runs, their components and the
//! deblending are one pass over the frame's bands and share its data structures.

use ndarray::Array2;
use rayon::prelude::*;

use super::background::BackgroundMap;
use super::convolve::convolve_visit;

#[derive(Debug, Clone, Copy, serde::Serialize, serde::Deserialize)]
pub struct DetectParams {
    /// Threshold in units of the filtered image's noise.
    pub sigma: f64,
    /// FWHM of the Gaussian matched filter, pixels.
    pub kernel_fwhm: f64,
    /// Smallest component (pixels above threshold) kept.
    pub min_area: usize,
    /// A secondary peak is its own source when the saddle towards a brighter peak is at
    /// least this fraction of its height below it...
    pub deblend_contrast: f64,
    /// ...and at least this many filtered-noise σ below it.
    pub deblend_sigma: f64,
}

impl Default for DetectParams {
    fn default() -> Self {
        Self {
            sigma: 5.0,
            kernel_fwhm: 3.0,
            min_area: 3,
            deblend_contrast: 0.1,
            deblend_sigma: 5.0,
        }
    }
}

/// A straight streak found as one long, thin component (satellite, aircraft, meteor).
/// Positions are FITS 1-based.
#[derive(Debug, Clone, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Trail {
    pub x0: f64,
    pub y0: f64,
    pub x1: f64,
    pub y1: f64,
    /// Direction from +x towards +y, degrees in [0, 180).
    pub angle_deg: f64,
    /// Full width across the streak (from its second moment, as a FWHM), pixels.
    pub width_px: f64,
    pub length_px: f64,
}

/// What detection found.
#[derive(Debug, Clone, Default)]
pub struct Detections {
    pub candidates: Vec<Candidate>,
    pub trails: Vec<Trail>,
}

/// A component's shape from the second moments of its pixel positions: a trail when
/// it is long (at least `min_length` px) and thin (length over width at least 6).
fn as_trail(pixels: &[u32], w: usize, min_length: f64) -> Option<Trail> {
    let n = pixels.len() as f64;
    if n < 20.0 {
        return None;
    }
    let (mut sx, mut sy) = (0.0, 0.0);
    for &p in pixels {
        sx += (p as usize % w) as f64;
        sy += (p as usize / w) as f64;
    }
    let (mx, my) = (sx / n, sy / n);
    let (mut cxx, mut cyy, mut cxy) = (0.0, 0.0, 0.0);
    for &p in pixels {
        let (dx, dy) = ((p as usize % w) as f64 - mx, (p as usize / w) as f64 - my);
        cxx += dx * dx;
        cyy += dy * dy;
        cxy += dx * dy;
    }
    let (cxx, cyy, cxy) = (cxx / n, cyy / n, cxy / n);
    let mean = 0.5 * (cxx + cyy);
    let d = (0.25 * (cxx - cyy).powi(2) + cxy * cxy).sqrt();
    let (major, minor) = (mean + d, (mean - d).max(1.0 / 12.0));
    let theta = 0.5 * (2.0 * cxy).atan2(cxx - cyy);
    let (ux, uy) = (theta.cos(), theta.sin());
    // Extent along the axis from the extreme projections.
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for &p in pixels {
        let t = ((p as usize % w) as f64 - mx) * ux + ((p as usize / w) as f64 - my) * uy;
        lo = lo.min(t);
        hi = hi.max(t);
    }
    let length = hi - lo;
    // A uniform bar of width W has variance W²/12 across it.
    let width = (12.0 * minor).sqrt();
    let _ = major;
    (length >= min_length && length >= 6.0 * width).then(|| Trail {
        x0: mx + lo * ux + 1.0,
        y0: my + lo * uy + 1.0,
        x1: mx + hi * ux + 1.0,
        y1: my + hi * uy + 1.0,
        angle_deg: theta.to_degrees().rem_euclid(180.0),
        width_px: width,
        length_px: length,
    })
}

/// A detected peak, before any measurement.
#[derive(Debug, Clone)]
pub struct Candidate {
    /// 0-based column and row of the filtered-image peak.
    pub x: usize,
    pub y: usize,
    /// Filtered value at the peak, in units of the filtered noise there.
    pub significance: f64,
    /// Component pixel count.
    pub area: usize,
    /// Other peaks deblended out of the same component.
    pub blended: bool,
    pub component: usize,
}

/// Normalised 1-D Gaussian kernel (sum 1), radius ⌈3σ⌉.
pub fn gaussian_kernel(fwhm: f64) -> Vec<f32> {
    let sigma = (fwhm / (2.0 * (2.0 * std::f64::consts::LN_2).sqrt())).max(0.3);
    let r = (3.0 * sigma).ceil() as i64;
    let k: Vec<f64> = (-r..=r)
        .map(|i| (-(i * i) as f64 / (2.0 * sigma * sigma)).exp())
        .collect();
    let sum: f64 = k.iter().sum();
    k.iter().map(|v| (v / sum) as f32).collect()
}

/// A horizontal run of pixels above the detection threshold: row `y`, columns
/// `x0..x1` (end exclusive).
#[derive(Debug, Clone, Copy)]
struct Run {
    y: u32,
    x0: u32,
    x1: u32,
}

/// Runs of 8-connected above-threshold pixels grouped into components, each a list of
/// indices into `runs`, ordered by their first pixel in raster order. Runs must be
/// sorted by row, then column. Union–find over runs (the two-pass labelling of
/// Rosenfeld & Pfaltz 1966, on runs rather than pixels).
fn connected_runs(runs: &[Run]) -> Vec<Vec<usize>> {
    fn find(parent: &mut [usize], mut i: usize) -> usize {
        while parent[i] != i {
            parent[i] = parent[parent[i]];
            i = parent[i];
        }
        i
    }
    let n = runs.len();
    let mut parent: Vec<usize> = (0..n).collect();
    // Runs of the previous row: [prev_start, prev_end); of this row: [row_start, i).
    let (mut prev_start, mut prev_end, mut row_start) = (0, 0, 0);
    for i in 0..n {
        if i > 0 && runs[i].y != runs[i - 1].y {
            if runs[i].y == runs[i - 1].y + 1 {
                (prev_start, prev_end) = (row_start, i);
            } else {
                (prev_start, prev_end) = (i, i);
            }
            row_start = i;
        }
        let Run { x0, x1, .. } = runs[i];
        // Diagonal neighbours count: columns x0 − 1 ..= x1 of the row above. Runs of a
        // row are ordered and disjoint, so those wholly to the left of this run are
        // wholly to the left of the row's later runs too, and are not looked at again.
        while prev_start < prev_end && runs[prev_start].x1 < x0 {
            prev_start += 1;
        }
        for (j, above) in runs.iter().enumerate().take(prev_end).skip(prev_start) {
            if above.x0 > x1 {
                break;
            }
            let (a, b) = (find(&mut parent, i), find(&mut parent, j));
            if a != b {
                // The earlier run stays the root, so a component is named by its first run.
                parent[a.max(b)] = a.min(b);
            }
        }
    }
    let mut component_of = vec![usize::MAX; n];
    let mut components: Vec<Vec<usize>> = Vec::new();
    for i in 0..n {
        let root = find(&mut parent, i);
        if component_of[root] == usize::MAX {
            component_of[root] = components.len();
            components.push(Vec::new());
        }
        components[component_of[root]].push(i);
    }
    components
}

/// What one component yields.
enum Found {
    Nothing,
    Trail(Trail),
    Peaks(Vec<((usize, usize), f32)>, usize),
}

/// One component of above-threshold runs (`members`, indices into `runs`; `offsets`:
/// where each run's filtered values start in `values`): too small, a streak, or its
/// peaks, deblended where the filtered image dips deeply enough between them.
fn component(
    members: &[usize],
    runs: &[Run],
    offsets: &[usize],
    values: &[f32],
    w: usize,
    params: &DetectParams,
    noise_at: &(impl Fn(usize, usize) -> f64 + Sync),
) -> Found {
    let area: usize = members
        .iter()
        .map(|&i| (runs[i].x1 - runs[i].x0) as usize)
        .sum();
    if area < params.min_area {
        return Found::Nothing;
    }
    let pixels: Vec<u32> = members
        .iter()
        .flat_map(|&i| {
            let r = runs[i];
            (r.x0..r.x1).map(move |x| r.y * w as u32 + x)
        })
        .collect();
    // A streak is reported whole; its peaks are not stars.
    if let Some(t) = as_trail(&pixels, w, 10.0 * params.kernel_fwhm.max(2.0)) {
        return Found::Trail(t);
    }
    let patch = Patch::of(members, runs, offsets, values);
    // Local maxima of the filtered image inside the component.
    let mut peaks: Vec<((usize, usize), f32)> = patch.local_maxima();
    peaks.sort_by(|a, b| b.1.total_cmp(&a.1));
    peaks.truncate(500);
    let (px, py) = peaks[0].0;
    let sigma_here = noise_at(px, py).max(1e-30);
    // Along a segment that leaves the component the filtered image is below the
    // threshold there; the threshold stands in for it (a lower bound on the dip).
    let outside = (params.sigma * sigma_here) as f32;
    let mut kept: Vec<((usize, usize), f32)> = Vec::new();
    for &(p, v) in &peaks {
        let isolated = kept.iter().all(|&(q, _)| {
            let saddle = patch.min_along_segment(p, q, outside);
            let depth = f64::from(v - saddle);
            depth >= params.deblend_contrast * f64::from(v)
                && depth >= params.deblend_sigma * sigma_here
        });
        if isolated {
            kept.push((p, v));
        }
    }
    Found::Peaks(kept, area)
}

/// Detect candidates in `residual` (image minus background).
pub fn detect(
    residual: &Array2<f32>,
    background: &BackgroundMap,
    params: &DetectParams,
) -> Detections {
    let (h, w) = residual.dim();
    if h == 0 || w == 0 {
        return Detections::default();
    }
    let kernel = gaussian_kernel(params.kernel_fwhm);
    // White noise filtered by k has σ_f = σ · sqrt(Σ k²) (2-D kernel = outer product).
    let k2: f64 = kernel.iter().map(|&v| f64::from(v).powi(2)).sum::<f64>();
    let noise_gain = k2; // sqrt(Σ_2D k²) = Σ_1D k² for a separable kernel
    let threshold_factor = (params.sigma * noise_gain) as f32;
    // Threshold each band as soon as it is filtered, keeping only the runs above it and
    // their filtered values; the filtered image itself is never stored whole.
    let band_runs = convolve_visit(residual, &kernel, |y0, rows| {
        let mut runs = Vec::new();
        let mut values = Vec::new();
        let mut rms = vec![0.0f32; w];
        let mut limit = vec![0.0f32; w];
        for (dy, row) in rows.chunks_exact(w).enumerate() {
            let y = y0 + dy;
            background.rms_row(y, &mut rms);
            for (l, &s) in limit.iter_mut().zip(&rms) {
                // A map without noise (σ = 0) detects nothing there.
                *l = if s > 0.0 {
                    threshold_factor * s
                } else {
                    f32::INFINITY
                };
            }
            // Blocks of 32 pixels are tested whole first (a vectorised maximum of the
            // excess over the threshold); only blocks with a pixel above it are walked.
            let mut x = 0;
            while x < w {
                let end = (x + 32).min(w);
                let excess = row[x..end]
                    .iter()
                    .zip(&limit[x..end])
                    .fold(f32::NEG_INFINITY, |m, (&v, &l)| m.max(v - l));
                if excess <= 0.0 {
                    x = end;
                    continue;
                }
                while x < end {
                    if row[x] > limit[x] {
                        // A run may continue past the block.
                        let start = x;
                        while x < w && row[x] > limit[x] {
                            x += 1;
                        }
                        runs.push(Run {
                            y: y as u32,
                            x0: start as u32,
                            x1: x as u32,
                        });
                        values.extend_from_slice(&row[start..x]);
                    } else {
                        x += 1;
                    }
                }
            }
        }
        (runs, values)
    });
    let mut runs: Vec<Run> = Vec::new();
    let mut values: Vec<f32> = Vec::new();
    for (r, v) in band_runs {
        runs.extend(r);
        values.extend(v);
    }
    // Where each run's values start in `values`.
    let offsets: Vec<usize> = runs
        .iter()
        .scan(0, |at, r| {
            let here = *at;
            *at += (r.x1 - r.x0) as usize;
            Some(here)
        })
        .collect();
    let noise_at = |x: usize, y: usize| background.rms_at(x as f64, y as f64) * noise_gain;

    let found: Vec<Found> = connected_runs(&runs)
        .par_iter()
        .map(|members| component(members, &runs, &offsets, &values, w, params, &noise_at))
        .collect();

    let mut candidates = Vec::new();
    let mut trails = Vec::new();
    let mut component = 0usize;
    for item in found {
        match item {
            Found::Nothing => {}
            Found::Trail(t) => trails.push(t),
            Found::Peaks(kept, area) => {
                component += 1;
                let blended = kept.len() > 1;
                for &((x, y), v) in &kept {
                    candidates.push(Candidate {
                        x,
                        y,
                        significance: f64::from(v) / noise_at(x, y).max(1e-30),
                        area,
                        blended,
                        component,
                    });
                }
            }
        }
    }
    Detections { candidates, trails }
}

/// A component's filtered values on its bounding box, NaN where the box is outside it.
struct Patch {
    x0: usize,
    y0: usize,
    w: usize,
    h: usize,
    v: Vec<f32>,
}

impl Patch {
    fn of(members: &[usize], runs: &[Run], offsets: &[usize], values: &[f32]) -> Self {
        let x0 = members.iter().map(|&i| runs[i].x0).min().unwrap_or(0) as usize;
        let x1 = members.iter().map(|&i| runs[i].x1).max().unwrap_or(0) as usize;
        let y0 = members.iter().map(|&i| runs[i].y).min().unwrap_or(0) as usize;
        let y1 = members.iter().map(|&i| runs[i].y).max().unwrap_or(0) as usize + 1;
        let (w, h) = (x1 - x0, y1 - y0);
        let mut v = vec![f32::NAN; w * h];
        for &i in members {
            let r = runs[i];
            let len = (r.x1 - r.x0) as usize;
            let at = (r.y as usize - y0) * w + (r.x0 as usize - x0);
            v[at..at + len].copy_from_slice(&values[offsets[i]..offsets[i] + len]);
        }
        Self { x0, y0, w, h, v }
    }

    /// Pixels of the component not exceeded by any 8-neighbour in it, as image (x, y)
    /// with their values. (Neighbours outside it are below the threshold, so below
    /// any of its pixels.) Ties (flat saturated tops) go to the earlier pixel in raster
    /// order, so a plateau gives one peak.
    fn local_maxima(&self) -> Vec<((usize, usize), f32)> {
        let (w, h) = (self.w as i64, self.h as i64);
        let mut out = Vec::new();
        for (p, &v) in self.v.iter().enumerate() {
            if v.is_nan() {
                continue;
            }
            let (x, y) = (p as i64 % w, p as i64 / w);
            let mut highest = true;
            'around: for dy in -1..=1 {
                for dx in -1..=1 {
                    let (nx, ny) = (x + dx, y + dy);
                    if (dx == 0 && dy == 0) || nx < 0 || ny < 0 || nx >= w || ny >= h {
                        continue;
                    }
                    let q = (ny * w + nx) as usize;
                    let u = self.v[q];
                    if u > v || (u == v && q < p) {
                        highest = false;
                        break 'around;
                    }
                }
            }
            if highest {
                out.push(((self.x0 + x as usize, self.y0 + y as usize), v));
            }
        }
        out
    }

    /// Smallest filtered value on the straight segment between two image pixels of the
    /// component; `outside` where the segment leaves it.
    fn min_along_segment(&self, a: (usize, usize), b: (usize, usize), outside: f32) -> f32 {
        let (ax, ay) = ((a.0 - self.x0) as f64, (a.1 - self.y0) as f64);
        let (bx, by) = ((b.0 - self.x0) as f64, (b.1 - self.y0) as f64);
        let steps = ((bx - ax).abs().max((by - ay).abs()).ceil() as usize).max(1) * 2;
        (0..=steps)
            .map(|i| {
                let t = i as f64 / steps as f64;
                let x = (ax + t * (bx - ax)).round() as usize;
                let y = (ay + t * (by - ay)).round() as usize;
                let v = self.v[y * self.w + x];
                if v.is_nan() {
                    outside
                } else {
                    v
                }
            })
            .fold(f32::INFINITY, f32::min)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kernel_is_normalised_and_symmetric() {
        let k = gaussian_kernel(3.0);
        let s: f32 = k.iter().sum();
        assert!((s - 1.0).abs() < 1e-6);
        assert_eq!(k.first(), k.last());
    }

    /// Components of a small picture, as sets of (x, y), by labelling its runs.
    fn components_of(picture: &[&str]) -> Vec<Vec<(u32, u32)>> {
        let mut runs = Vec::new();
        for (y, line) in picture.iter().enumerate() {
            let b = line.as_bytes();
            let mut x = 0;
            while x < b.len() {
                if b[x] == b'#' {
                    let start = x;
                    while x < b.len() && b[x] == b'#' {
                        x += 1;
                    }
                    runs.push(Run {
                        y: y as u32,
                        x0: start as u32,
                        x1: x as u32,
                    });
                } else {
                    x += 1;
                }
            }
        }
        connected_runs(&runs)
            .into_iter()
            .map(|members| {
                let mut px: Vec<(u32, u32)> = members
                    .iter()
                    .flat_map(|&i| {
                        let r = runs[i];
                        (r.x0..r.x1).map(move |x| (x, r.y))
                    })
                    .collect();
                px.sort_unstable();
                px
            })
            .collect()
    }

    #[test]
    fn runs_join_into_eight_connected_components() {
        // Diagonal contact joins (8-connectivity); a U joins at its base after its arms
        // were seen apart; a gap of one row or one column separates.
        let picture = [
            "#.....#..#.#",
            ".#....#..#.#",
            "..#...#..###",
            "......#.....",
            "##..........",
            "..........##",
        ];
        let comps = components_of(&picture);
        let sizes: Vec<usize> = comps.iter().map(|c| c.len()).collect();
        assert_eq!(sizes, vec![3, 4, 7, 2, 2], "{comps:?}");
        // Ordered by first pixel in raster order.
        assert_eq!(comps[0][0], (0, 0));
        assert_eq!(comps[2].first(), Some(&(9, 0)));
        assert!(comps[3].contains(&(0, 4)) && comps[4].contains(&(11, 5)));
    }

    /// Unit-noise sky (seeded) with the given sources added; detection on it.
    fn detect_on(add: impl Fn(f64, f64) -> f64) -> Detections {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let (h, w) = (128, 160);
        let mut rng = rand::rngs::StdRng::seed_from_u64(7);
        let noise = Normal::new(0.0, 1.0).unwrap();
        let img = Array2::from_shape_fn((h, w), |(y, x)| {
            (noise.sample(&mut rng) + add(x as f64, y as f64)) as f32
        });
        let bkg = BackgroundMap::estimate(
            &img,
            None,
            super::super::background::BackgroundParams::default(),
        )
        .unwrap();
        let mut residual = img.clone();
        let mut row = vec![0.0; w];
        for (y, mut r) in residual.rows_mut().into_iter().enumerate() {
            bkg.level_row(y, &mut row);
            r.iter_mut().zip(&row).for_each(|(v, l)| *v -= l);
        }
        detect(&residual, &bkg, &DetectParams::default())
    }

    fn star(x0: f64, y0: f64, amp: f64) -> impl Fn(f64, f64) -> f64 {
        // Gaussian of FWHM 3 px (σ = 3 / 2.3548).
        move |x, y| amp * (-((x - x0).powi(2) + (y - y0).powi(2)) / (2.0 * 1.274f64.powi(2))).exp()
    }

    #[test]
    fn close_pairs_are_split_and_single_stars_are_not() {
        // Two stars 6 px apart: halfway, 3 px = 2.4σ from each, the light falls to
        // (200 + 150)·exp(−2.4²/2) ≈ 22, a seventh of the fainter peak (analytic,
        // before filtering), so two blended candidates.
        let a = star(60.0, 50.0, 200.0);
        let b = star(66.0, 50.0, 150.0);
        let found = detect_on(|x, y| a(x, y) + b(x, y));
        let mut xs: Vec<usize> = found.candidates.iter().map(|c| c.x).collect();
        xs.sort_unstable();
        assert_eq!(xs, vec![60, 66], "{:?}", found.candidates);
        assert!(found.candidates.iter().all(|c| c.blended));
        // One star with a flat (clipped) top is one candidate.
        let c = star(100.0, 80.0, 400.0);
        let found = detect_on(|x, y| c(x, y).min(250.0));
        assert_eq!(found.candidates.len(), 1, "{:?}", found.candidates);
        assert!(!found.candidates[0].blended);
        // A streak is a trail, not a row of stars.
        let found = detect_on(|x, y| {
            // Distance from the line y = 20 + x/2.
            let d = (y - 20.0 - 0.5 * x).abs() / 1.25f64.sqrt();
            if (10.0..150.0).contains(&x) {
                60.0 * (-d * d / 2.0).exp()
            } else {
                0.0
            }
        });
        assert_eq!(found.trails.len(), 1, "{:?}", found.candidates);
        assert!(found.candidates.is_empty(), "{:?}", found.candidates);
    }
}
