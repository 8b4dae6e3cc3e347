//! Sources in reference coordinates, each with its detections frame by frame.

use std::collections::HashMap;

use super::register::Affine;

#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TrackPoint {
    pub frame: usize,
    /// FITS position in the frame itself.
    pub x: f64,
    pub y: f64,
    /// Position in the reference frame.
    pub xr: f64,
    pub yr: f64,
    pub flux: f64,
    pub flux_err: f64,
    pub snr: f64,
    pub fwhm_px: f64,
    pub rgb: Option<[f64; 3]>,
    pub blended: bool,
}

#[derive(Debug, Clone, Default)]
pub struct Source {
    pub xr: f64,
    pub yr: f64,
    pub points: Vec<TrackPoint>,
}

impl Source {
    pub fn in_frame(&self, frame: usize) -> Option<&TrackPoint> {
        self.points.iter().find(|p| p.frame == frame)
    }
}

/// Associates detections with sources by position in reference coordinates.
#[derive(Debug, Default)]
pub struct Tracks {
    pub sources: Vec<Source>,
    grid: HashMap<(i64, i64), Vec<usize>>,
    cell: f64,
    radius: f64,
}

impl Tracks {
    pub fn new(radius: f64) -> Self {
        Tracks {
            sources: Vec::new(),
            grid: HashMap::new(),
            cell: radius.max(0.5) * 2.0,
            radius,
        }
    }

    fn key(&self, x: f64, y: f64) -> (i64, i64) {
        (
            (x / self.cell).floor() as i64,
            (y / self.cell).floor() as i64,
        )
    }

    /// Add one frame's detections (already carrying reference positions). Each source
    /// takes at most one detection per frame: the nearest.
    pub fn add_frame(&mut self, points: &[TrackPoint]) {
        let mut claims: Vec<(f64, usize, usize)> = Vec::new();
        for (k, p) in points.iter().enumerate() {
            let (cx, cy) = self.key(p.xr, p.yr);
            for gx in cx - 1..=cx + 1 {
                for gy in cy - 1..=cy + 1 {
                    for &s in self.grid.get(&(gx, gy)).into_iter().flatten() {
                        let src = &self.sources[s];
                        let d = (src.xr - p.xr).hypot(src.yr - p.yr);
                        if d <= self.radius {
                            claims.push((d, k, s));
                        }
                    }
                }
            }
        }
        claims.sort_by(|a, b| a.0.total_cmp(&b.0));
        let mut point_used = vec![false; points.len()];
        let mut source_used = std::collections::HashSet::new();
        for (_, k, s) in claims {
            if point_used[k] || source_used.contains(&s) {
                continue;
            }
            point_used[k] = true;
            source_used.insert(s);
            let src = &mut self.sources[s];
            src.points.push(points[k]);
            let n = src.points.len() as f64;
            // Running mean of the reference position.
            src.xr += (points[k].xr - src.xr) / n;
            src.yr += (points[k].yr - src.yr) / n;
        }
        for (k, p) in points.iter().enumerate() {
            if !point_used[k] {
                let idx = self.sources.len();
                self.sources.push(Source {
                    xr: p.xr,
                    yr: p.yr,
                    points: vec![*p],
                });
                let key = self.key(p.xr, p.yr);
                self.grid.entry(key).or_default().push(idx);
            }
        }
    }
}

/// Whether a reference position falls inside a frame (with a margin), given the
/// frame → reference transform.
pub fn covers(t: &Affine, width: usize, height: usize, xr: f64, yr: f64, margin: f64) -> bool {
    let Some(inv) = t.inverse() else { return false };
    let (x, y) = inv.apply((xr, yr));
    x >= 0.5 + margin
        && y >= 0.5 + margin
        && x <= width as f64 + 0.5 - margin
        && y <= height as f64 + 0.5 - margin
}
