//! Sky background and its noise as smooth maps: a mesh of boxes, each summarised by
//! sigma-clipped statistics and the mode estimate of Bertin & Arnouts (1996), a 3×3
//! median filter over the mesh, and a natural bicubic spline between box centres
//! (linear beyond the outermost centres), so gradients from the Moon or light
//! pollution are followed rather than averaged. Pure: pixels in, map out.
//! Its length past 600 lines is tests: the mesh, the filter and the spline are one map.

use ndarray::Array2;
use rayon::prelude::*;

use super::stats::{median_f64, sigma_clip_on, Grid, CLIP3_STD_CORRECTION};

#[derive(Debug, Clone, Copy, serde::Serialize, serde::Deserialize)]
pub struct BackgroundParams {
    /// Mesh box side in pixels.
    pub box_size: usize,
    /// Side of the median filter over the mesh (odd; 1 disables it).
    pub filter_size: usize,
    /// The grid the raw pixel values sit on, when they do (see [`Grid`]): the sky's
    /// median is then taken as that of grouped data, not snapped to the grid.
    pub grid: Option<Grid>,
}

impl Default for BackgroundParams {
    fn default() -> Self {
        Self {
            box_size: 64,
            filter_size: 3,
            grid: None,
        }
    }
}

/// Background level and noise at mesh resolution, with spline evaluation per row.
#[derive(Debug, Clone)]
pub struct BackgroundMap {
    centers_x: Vec<f64>,
    /// Row-major ny × nx.
    level: Vec<f64>,
    rms: Vec<f64>,
    /// Splines down each mesh column, built once: a row is then one spline across.
    level_columns: Vec<Spline>,
    rms_columns: Vec<Spline>,
    /// Both maps sampled on a grid of every `GRID_STEP`th row and column of the image
    /// they were estimated on; rows of that image are read from here.
    level_grid: SampledGrid,
    rms_grid: SampledGrid,
}

/// Rows and columns between exact samples of the spline map. Over 8 px a sky that
/// curves on the scale of the 64-px mesh departs from the chord by less than a
/// thousandth of its change.
const GRID_STEP: usize = 8;

/// A map sampled at rows and columns 0, 8, 16, … and at the last row and column; any
/// pixel is the bilinear interpolation of its four surrounding samples.
#[derive(Debug, Clone, Default)]
struct SampledGrid {
    width: usize,
    height: usize,
    /// Sampled positions along each axis.
    xs: Vec<usize>,
    ys: Vec<usize>,
    /// Row-major ys.len() × xs.len().
    values: Vec<f32>,
}

impl SampledGrid {
    fn positions(n: usize) -> Vec<usize> {
        let mut v: Vec<usize> = (0..n).step_by(GRID_STEP).collect();
        if n > 0 && v.last() != Some(&(n - 1)) {
            v.push(n - 1);
        }
        v
    }

    fn new(centers_x: &[f64], columns: &[Spline], width: usize, height: usize) -> Self {
        let xs = Self::positions(width);
        let ys = Self::positions(height);
        let values = ys
            .par_iter()
            .flat_map_iter(|&y| {
                let across = across(centers_x, columns, y as f64);
                let mut hint = 0;
                xs.iter()
                    .map(move |&x| across.eval_forward(&mut hint, x as f64) as f32)
                    .collect::<Vec<_>>()
            })
            .collect();
        Self {
            width,
            height,
            xs,
            ys,
            values,
        }
    }

    /// The bilinear interpolation at (x, y), 0-based pixel coordinates; `None` outside
    /// the sampled image.
    fn at(&self, x: f64, y: f64) -> Option<f64> {
        let (w, h) = (self.width as f64, self.height as f64);
        if self.xs.is_empty() || !(0.0..=w - 1.0).contains(&x) || !(0.0..=h - 1.0).contains(&y) {
            return None;
        }
        // The sample at or before a position, and the next one (the same at the end).
        let bracket = |pos: f64, samples: &[usize]| {
            let k = ((pos as usize) / GRID_STEP).min(samples.len() - 1);
            let k1 = (k + 1).min(samples.len() - 1);
            let span = (samples[k1] - samples[k]) as f64;
            let t = if span > 0.0 {
                (pos - samples[k] as f64) / span
            } else {
                0.0
            };
            (k, k1, t)
        };
        let (i0, i1, tx) = bracket(x, &self.xs);
        let (j0, j1, ty) = bracket(y, &self.ys);
        let nx = self.xs.len();
        let v = |i: usize, j: usize| f64::from(self.values[j * nx + i]);
        let top = v(i0, j0) + tx * (v(i1, j0) - v(i0, j0));
        let bottom = v(i0, j1) + tx * (v(i1, j1) - v(i0, j1));
        Some(top + ty * (bottom - top))
    }

    /// Row `y` into `out`; false when `out` is not a row of the sampled image.
    fn row(&self, y: usize, out: &mut [f32]) -> bool {
        if out.len() != self.width || y >= self.height || self.xs.is_empty() {
            return false;
        }
        let nx = self.xs.len();
        let k = (y / GRID_STEP).min(self.ys.len() - 1);
        let (k0, k1) = if self.ys[k] == y || k + 1 == self.ys.len() {
            (k, k)
        } else {
            (k, k + 1)
        };
        let t = if k0 == k1 {
            0.0
        } else {
            (y - self.ys[k0]) as f32 / (self.ys[k1] - self.ys[k0]) as f32
        };
        let r0 = &self.values[k0 * nx..(k0 + 1) * nx];
        let r1 = &self.values[k1 * nx..(k1 + 1) * nx];
        let samples: Vec<f32> = r0.iter().zip(r1).map(|(a, b)| a + t * (b - a)).collect();
        // Whole 8-px spans between samples 8 px apart: a fixed-length, vectorisable fill.
        const STEPS: [f32; GRID_STEP] = {
            let mut f = [0.0; GRID_STEP];
            let mut j = 0;
            while j < GRID_STEP {
                f[j] = j as f32 / GRID_STEP as f32;
                j += 1;
            }
            f
        };
        let whole = (self.width - 1) / GRID_STEP;
        for (span, pair) in out[..whole * GRID_STEP]
            .chunks_exact_mut(GRID_STEP)
            .zip(samples.windows(2))
        {
            let (a, d) = (pair[0], pair[1] - pair[0]);
            for (o, f) in span.iter_mut().zip(&STEPS) {
                *o = a + d * f;
            }
        }
        // A shorter last span up to the last column, which is always a sample.
        let last = samples[nx - 1];
        let x0 = whole * GRID_STEP;
        if x0 < self.width - 1 {
            let (a, len) = (samples[whole], (self.width - 1 - x0) as f32);
            for (j, o) in out[x0..self.width - 1].iter_mut().enumerate() {
                *o = a + (last - a) * (j as f32 / len);
            }
        }
        out[self.width - 1] = last;
        true
    }
}

/// The spline across the mesh at height `y`: down each column, then across.
fn across(centers_x: &[f64], columns: &[Spline], y: f64) -> Spline {
    Spline::new(
        centers_x.to_vec(),
        columns.iter().map(|c| c.eval(y)).collect(),
    )
}

impl BackgroundMap {
    /// Estimate the map. `mask[i] == true` excludes pixel `i` (row-major) from the
    /// statistics. `None` when the image has no finite pixel.
    pub fn estimate(
        image: &Array2<f32>,
        mask: Option<&[bool]>,
        params: BackgroundParams,
    ) -> Option<Self> {
        Self::estimate_with_offset(image, mask, None, params)
    }

    /// As [`Self::estimate`], for an image from which `offset` was already subtracted:
    /// the statistics are taken of image + offset, without a second copy of the image.
    pub fn estimate_with_offset(
        image: &Array2<f32>,
        mask: Option<&[bool]>,
        offset: Option<&BackgroundMap>,
        params: BackgroundParams,
    ) -> Option<Self> {
        let (h, w) = image.dim();
        let data = image.as_slice()?;
        let bs = params.box_size.max(8).min(w.max(h));
        let edges = |n: usize| -> Vec<(usize, usize)> {
            let count = n.div_ceil(bs).max(1);
            // Spread the remainder evenly instead of leaving a thin last box.
            (0..count)
                .map(|i| (i * n / count, (i + 1) * n / count))
                .collect()
        };
        let xs = edges(w);
        let ys = edges(h);
        let cells: Vec<Option<(f64, f64)>> = ys
            .par_iter()
            .flat_map_iter(|&(y0, y1)| {
                // Above ~2000 sky values the mode estimate no longer improves by much
                // (its error is a few hundredths of σ); large boxes take every other pixel
                // in a quincunx, which keeps the sample centred.
                let sparse = |&(x0, x1): &(usize, usize)| (y1 - y0) * (x1 - x0) >= 2048;
                let mut bufs: Vec<Vec<f32>> = xs
                    .iter()
                    .map(|b| Vec::with_capacity((y1 - y0) * (b.1 - b.0)))
                    .collect();
                // Row by row across all the band's boxes, so the offset row (when there
                // is one) is worked out once per image row.
                let mut add = vec![0.0f32; if offset.is_some() { w } else { 0 }];
                for y in y0..y1 {
                    let row = &data[y * w..(y + 1) * w];
                    if let Some(o) = offset {
                        o.level_row(y, &mut add);
                    }
                    let masked = mask.map(|m| &m[y * w..(y + 1) * w]);
                    for (buf, b) in bufs.iter_mut().zip(&xs) {
                        let (step, first) = if sparse(b) {
                            // The first column of this row's share of the quincunx.
                            (2, b.0 + (b.0 + y) % 2)
                        } else {
                            (1, b.0)
                        };
                        let columns = (first..b.1).step_by(step);
                        match (masked, offset.is_some()) {
                            (None, false) => {
                                buf.extend(columns.map(|x| row[x]).filter(|v| v.is_finite()))
                            }
                            (None, true) => buf.extend(
                                columns
                                    .filter(|&x| row[x].is_finite())
                                    .map(|x| row[x] + add[x]),
                            ),
                            (Some(m), false) => buf.extend(
                                columns
                                    .filter(|&x| !m[x] && row[x].is_finite())
                                    .map(|x| row[x]),
                            ),
                            (Some(m), true) => buf.extend(
                                columns
                                    .filter(|&x| !m[x] && row[x].is_finite())
                                    .map(|x| row[x] + add[x]),
                            ),
                        }
                    }
                }
                bufs.into_iter()
                    .zip(&xs)
                    .map(|(mut buf, b)| {
                        let area = (y1 - y0) * (b.1 - b.0) / if sparse(b) { 2 } else { 1 };
                        // A box mostly covered by sources or bad pixels says little
                        // about the sky; its neighbours fill it in below.
                        if buf.len() * 10 < area * 3 {
                            return None;
                        }
                        let s = sigma_clip_on(&mut buf, 3.0, 5, params.grid)?;
                        Some((s.mode(), s.std / CLIP3_STD_CORRECTION))
                    })
                    .collect::<Vec<_>>()
            })
            .collect();
        let (nx, ny) = (xs.len(), ys.len());
        let mut level: Vec<Option<f64>> = cells.iter().map(|c| c.map(|v| v.0)).collect();
        let mut rms: Vec<Option<f64>> = cells.iter().map(|c| c.map(|v| v.1)).collect();
        fill_missing(&mut level, nx, ny)?;
        fill_missing(&mut rms, nx, ny)?;
        let mut level: Vec<f64> = level.into_iter().map(|v| v.unwrap_or(0.0)).collect();
        let mut rms: Vec<f64> = rms.into_iter().map(|v| v.unwrap_or(0.0)).collect();
        if params.filter_size > 1 {
            level = median_filter(&level, nx, ny, params.filter_size / 2);
            rms = median_filter(&rms, nx, ny, params.filter_size / 2);
        }
        let center = |&(a, b): &(usize, usize)| (a + b) as f64 / 2.0 - 0.5;
        let centers_y: Vec<f64> = ys.iter().map(center).collect();
        let columns = |grid: &[f64]| -> Vec<Spline> {
            (0..nx)
                .map(|i| {
                    Spline::new(
                        centers_y.clone(),
                        (0..ny).map(|j| grid[j * nx + i]).collect(),
                    )
                })
                .collect()
        };
        let centers_x: Vec<f64> = xs.iter().map(center).collect();
        let level_columns = columns(&level);
        let rms_columns = columns(&rms);
        Some(Self {
            level_grid: SampledGrid::new(&centers_x, &level_columns, w, h),
            rms_grid: SampledGrid::new(&centers_x, &rms_columns, w, h),
            centers_x,
            level_columns,
            rms_columns,
            level,
            rms,
        })
    }

    /// The map of `self − other` (same mesh required; the knots are taken from `self`).
    pub fn minus(&self, other: &BackgroundMap) -> BackgroundMap {
        let level: Vec<f64> = self
            .level
            .iter()
            .zip(&other.level)
            .map(|(a, b)| a - b)
            .collect();
        let nx = self.centers_x.len();
        let ny = level.len() / nx.max(1);
        let centers_y = self
            .level_columns
            .first()
            .map(|c| c.t.clone())
            .unwrap_or_default();
        let level_columns: Vec<Spline> = (0..nx)
            .map(|i| {
                Spline::new(
                    centers_y.clone(),
                    (0..ny).map(|j| level[j * nx + i]).collect(),
                )
            })
            .collect();
        let grid = &self.level_grid;
        BackgroundMap {
            level_grid: SampledGrid::new(&self.centers_x, &level_columns, grid.width, grid.height),
            rms_grid: self.rms_grid.clone(),
            centers_x: self.centers_x.clone(),
            level,
            rms: self.rms.clone(),
            level_columns,
            rms_columns: self.rms_columns.clone(),
        }
    }

    /// Background level along row `y` (0-based) into `out` (one value per column),
    /// interpolated between the spline's samples every 8 rows and columns.
    pub fn level_row(&self, y: usize, out: &mut [f32]) {
        if !self.level_grid.row(y, out) {
            coarse_into(&across(&self.centers_x, &self.level_columns, y as f64), out);
        }
    }

    /// Sky noise (1σ per pixel) along row `y`, evaluated as `level_row` is.
    pub fn rms_row(&self, y: usize, out: &mut [f32]) {
        if !self.rms_grid.row(y, out) {
            coarse_into(&across(&self.centers_x, &self.rms_columns, y as f64), out);
        }
    }

    /// Background level at one position (0-based pixel coordinates), interpolated as
    /// the rows are (the spline itself outside the image).
    pub fn level_at(&self, x: f64, y: f64) -> f64 {
        self.level_grid
            .at(x, y)
            .unwrap_or_else(|| across(&self.centers_x, &self.level_columns, y).eval(x))
    }

    /// Sky noise at one position (0-based pixel coordinates), as `level_at`.
    pub fn rms_at(&self, x: f64, y: f64) -> f64 {
        self.rms_grid
            .at(x, y)
            .unwrap_or_else(|| across(&self.centers_x, &self.rms_columns, y).eval(x))
    }

    /// Median of the mesh levels: the frame's typical sky level.
    pub fn median_level(&self) -> f64 {
        median_f64(&self.level).unwrap_or(0.0)
    }

    /// Median of the mesh noise values.
    pub fn median_rms(&self) -> f64 {
        median_f64(&self.rms).unwrap_or(0.0)
    }

    /// Largest minus smallest mesh level: how much the sky changes across the frame.
    pub fn level_range(&self) -> f64 {
        let max = self.level.iter().copied().fold(f64::MIN, f64::max);
        let min = self.level.iter().copied().fold(f64::MAX, f64::min);
        max - min
    }
}

/// Spline values at x = 0, 1, 2, … into `out`, computed exactly every 8 pixels and
/// linearly between (for rows of an image other than the one the map was made on).
fn coarse_into(spline: &Spline, out: &mut [f32]) {
    const STEP: usize = GRID_STEP;
    let n = out.len();
    if n == 0 {
        return;
    }
    let mut hint = 0;
    let mut x0 = 0;
    let mut v0 = spline.eval_forward(&mut hint, 0.0);
    while x0 < n - 1 {
        let x1 = (x0 + STEP).min(n - 1);
        let v1 = spline.eval_forward(&mut hint, x1 as f64);
        let (start, slope) = (v0 as f32, ((v1 - v0) / (x1 - x0) as f64) as f32);
        for (k, o) in out[x0..x1].iter_mut().enumerate() {
            *o = start + slope * k as f32;
        }
        x0 = x1;
        v0 = v1;
    }
    out[n - 1] = v0 as f32;
}

/// Replace missing mesh cells by the median of their valid neighbours, growing outward;
/// `None` when no cell is valid.
fn fill_missing(grid: &mut [Option<f64>], nx: usize, ny: usize) -> Option<()> {
    if grid.iter().all(|c| c.is_none()) {
        return None;
    }
    while grid.iter().any(|c| c.is_none()) {
        let snapshot = grid.to_vec();
        for j in 0..ny {
            for i in 0..nx {
                if snapshot[j * nx + i].is_some() {
                    continue;
                }
                let mut near = Vec::new();
                for dj in -1i64..=1 {
                    for di in -1i64..=1 {
                        let (a, b) = (i as i64 + di, j as i64 + dj);
                        if a >= 0 && b >= 0 && (a as usize) < nx && (b as usize) < ny {
                            if let Some(v) = snapshot[b as usize * nx + a as usize] {
                                near.push(v);
                            }
                        }
                    }
                }
                grid[j * nx + i] = median_f64(&near);
            }
        }
    }
    Some(())
}

fn median_filter(grid: &[f64], nx: usize, ny: usize, half: usize) -> Vec<f64> {
    let mut out = vec![0.0; grid.len()];
    let mut near = Vec::new();
    for j in 0..ny {
        for i in 0..nx {
            near.clear();
            // A window kept symmetric about the cell, shrinking at the edges, so a
            // gradient is not pulled inwards at the border.
            let hx = half.min(i).min(nx - 1 - i);
            let hy = half.min(j).min(ny - 1 - j);
            for b in j - hy..=j + hy {
                for a in i - hx..=i + hx {
                    near.push(grid[b * nx + a]);
                }
            }
            out[j * nx + i] = median_f64(&near).unwrap_or(grid[j * nx + i]);
        }
    }
    out
}

/// Natural cubic spline through (t, v) with linear continuation beyond the end knots
/// (the natural end condition has zero curvature there, so the line is its continuation).
#[derive(Debug, Clone)]
struct Spline {
    t: Vec<f64>,
    v: Vec<f64>,
    m: Vec<f64>,
    /// Per interval: 1/h and h²/6.
    inv_h: Vec<f64>,
    h2_6: Vec<f64>,
}

impl Spline {
    fn new(t: Vec<f64>, v: Vec<f64>) -> Self {
        let n = t.len();
        let mut m = vec![0.0; n];
        if n >= 3 {
            // Tridiagonal system for the second derivatives (Thomas algorithm).
            let mut c_prime = vec![0.0; n];
            let mut d_prime = vec![0.0; n];
            for i in 1..n - 1 {
                let h0 = t[i] - t[i - 1];
                let h1 = t[i + 1] - t[i];
                let a = h0 / 6.0;
                let b = (h0 + h1) / 3.0;
                let c = h1 / 6.0;
                let d = (v[i + 1] - v[i]) / h1 - (v[i] - v[i - 1]) / h0;
                let denom = b - a * c_prime[i - 1];
                c_prime[i] = c / denom;
                d_prime[i] = (d - a * d_prime[i - 1]) / denom;
            }
            for i in (1..n - 1).rev() {
                m[i] = d_prime[i] - c_prime[i] * m[i + 1];
            }
        }
        let inv_h = t.windows(2).map(|w| 1.0 / (w[1] - w[0])).collect();
        let h2_6 = t.windows(2).map(|w| (w[1] - w[0]).powi(2) / 6.0).collect();
        Self {
            t,
            v,
            m,
            inv_h,
            h2_6,
        }
    }

    fn interior(&self, j: usize, x: f64) -> f64 {
        let (t, v, m) = (&self.t, &self.v, &self.m);
        let a = (t[j + 1] - x) * self.inv_h[j];
        let b = 1.0 - a;
        a * v[j]
            + b * v[j + 1]
            + ((a * a * a - a) * m[j] + (b * b * b - b) * m[j + 1]) * self.h2_6[j]
    }

    fn eval(&self, x: f64) -> f64 {
        let (t, v, m) = (&self.t, &self.v, &self.m);
        let n = t.len();
        if n == 1 {
            return v[0];
        }
        if x <= t[0] {
            let h = t[1] - t[0];
            let slope = (v[1] - v[0]) / h - h * (2.0 * m[0] + m[1]) / 6.0;
            return v[0] + slope * (x - t[0]);
        }
        if x >= t[n - 1] {
            let h = t[n - 1] - t[n - 2];
            let slope = (v[n - 1] - v[n - 2]) / h + h * (m[n - 2] + 2.0 * m[n - 1]) / 6.0;
            return v[n - 1] + slope * (x - t[n - 1]);
        }
        let j = t.partition_point(|&k| k <= x).clamp(1, n - 1) - 1;
        self.interior(j, x)
    }

    /// As `eval`, for a run of increasing x: `hint` keeps the interval found last, so a
    /// row costs no search.
    fn eval_forward(&self, hint: &mut usize, x: f64) -> f64 {
        let n = self.t.len();
        if n == 1 || x <= self.t[0] || x >= self.t[n - 1] {
            return self.eval(x);
        }
        *hint = (*hint).min(n - 2);
        if self.t[*hint] > x {
            *hint = 0;
        }
        while self.t[*hint + 1] <= x {
            *hint += 1;
        }
        self.interior(*hint, x)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn spline_reproduces_a_straight_line_everywhere() {
        // A natural cubic spline through collinear points is that line (analytic).
        let t = [0.0, 1.0, 2.5, 4.0];
        let v: Vec<f64> = t.iter().map(|x| 3.0 - 2.0 * x).collect();
        let s = Spline::new(t.to_vec(), v);
        for x in [-2.0, 0.3, 1.7, 3.9, 6.0] {
            assert!((s.eval(x) - (3.0 - 2.0 * x)).abs() < 1e-12);
        }
    }

    #[test]
    fn planar_gradient_is_followed_to_the_edges() {
        use rand::SeedableRng;
        use rand_distr::{Distribution, Normal};
        let (h, w) = (300, 500);
        let mut rng = rand::rngs::StdRng::seed_from_u64(3);
        let noise = Normal::new(0.0, 1.0).unwrap();
        let img = Array2::from_shape_fn((h, w), |(y, x)| {
            (1000.0 + 0.05 * x as f64 - 0.025 * y as f64 + noise.sample(&mut rng)) as f32
        });
        let map = BackgroundMap::estimate(&img, None, BackgroundParams::default()).unwrap();
        let mut row = vec![0.0; w];
        for y in [0, 150, 299] {
            map.level_row(y, &mut row);
            for x in [0, 250, 499] {
                let truth = 1000.0 + 0.05 * x as f64 - 0.025 * y as f64;
                assert!(
                    (row[x] as f64 - truth).abs() < 0.25,
                    "({x},{y}) {} vs {truth}",
                    row[x]
                );
            }
        }
    }

    #[test]
    fn rows_and_points_follow_the_spline_between_samples() {
        // A sky curving on the mesh scale: the interpolated rows and points stay within a
        // thousandth of its range of the spline itself, and agree with each other.
        let (h, w) = (301, 523);
        let img = Array2::from_shape_fn((h, w), |(y, x)| {
            let (u, v) = (x as f64 / w as f64, y as f64 / h as f64);
            (1000.0 + 300.0 * (3.0 * u).sin() * (2.0 * v).cos() + 80.0 * u * v) as f32
        });
        let map = BackgroundMap::estimate(&img, None, BackgroundParams::default()).unwrap();
        let range = map.level_range();
        let mut row = vec![0.0; w];
        for y in [0, 7, 8, 150, 299, 300] {
            map.level_row(y, &mut row);
            let exact = across(&map.centers_x, &map.level_columns, y as f64);
            for x in [0, 1, 7, 8, 9, 260, 515, 516, 521, 522] {
                let spline = exact.eval(x as f64);
                assert!(
                    (f64::from(row[x]) - spline).abs() < 1e-3 * range,
                    "({x},{y})"
                );
                assert!((map.level_at(x as f64, y as f64) - f64::from(row[x])).abs() < 1e-3);
            }
        }
    }

    #[test]
    fn empty_image_has_no_map() {
        let img = Array2::from_elem((50, 50), f32::NAN);
        assert!(BackgroundMap::estimate(&img, None, BackgroundParams::default()).is_none());
    }
}
