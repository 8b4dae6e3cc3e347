//! What is unusual in a night: every source followed across the frames (placed on the
//! group's reference by `judge`), then one classifier per kind of anomaly over the same
//! night context: `trails`, `sharp` (hot pixels and cosmic rays), `orphans` (moving
//! objects and transients), `variables`, `color`, and `catalogue` (tonight's catalogue
//! and the sources earlier nights did not have). Pure.

mod catalogue;
mod color;
mod ensemble;
mod orphans;
mod sharp;
mod trails;
mod variables;

use super::register::Affine;
use super::register::Placement;
use super::tracks::{covers, Source, TrackPoint, Tracks};
use super::{Anomaly, AnomalyKind, CatalogSource, Detail, Detection, EarlierNight, FrameInput};
use crate::measure::stats::median_f64;

/// What a night holds besides its verdicts.
#[derive(Debug, Clone, Default)]
pub struct Findings {
    pub anomalies: Vec<Anomaly>,
    /// Tonight's persistent sources, for comparing later nights.
    pub catalog: Vec<CatalogSource>,
    /// Faintest instrumental magnitude reliably detected in the reference frame.
    pub limit_mag: Option<f64>,
    /// The reference frame's corners on the sky (RA, Dec degrees), when it has a WCS:
    /// what tonight could have seen.
    pub footprint: Vec<(f64, f64)>,
}

/// The night every classifier looks at: the frames in time order, placed on the
/// reference, and every source followed across them.
pub(super) struct Night<'a, 'f> {
    pub frames: &'a [FrameInput<'f>],
    pub n: usize,
    /// Frame indices in time order, and each frame's rank in it.
    pub order: Vec<usize>,
    pub position_in_time: Vec<usize>,
    /// Each frame's time (seconds; a minute apart when the headers have none).
    pub times: Vec<f64>,
    pub transforms: Vec<Option<Affine>>,
    pub transparency_loss: &'a [Option<f64>],
    pub reference: usize,
    /// The night's typical FWHM, the radius that matches a source across frames, and
    /// the margin a source needs from a frame's edge to count as covered.
    pub fwhm: f64,
    pub radius: f64,
    pub edge: f64,
    pub sources: Vec<Source>,
    /// Seen in at least three frames and half the frames that covered it.
    pub persistent: Vec<bool>,
    /// Each frame's limiting flux.
    pub limits: Vec<Option<f64>>,
}

/// Faintest flux a frame detects reliably: 7 × the median flux-per-SNR of its fainter
/// stars (for background-limited stars SNR grows in proportion to flux).
pub(super) fn limiting_flux(f: &FrameInput) -> Option<f64> {
    let ratios: Vec<f64> = f
        .stars
        .iter()
        .filter(|s| s.snr > 5.0 && s.snr < 40.0)
        .map(|s| s.flux / s.snr)
        .collect();
    median_f64(&ratios).map(|r| 7.0 * r)
}

/// Upper-tail probability of χ² with k degrees of freedom, by the cube-root normal
/// approximation of Wilson & Hilferty (1931, PNAS 17, 684) and the complementary error
/// function (Abramowitz & Stegun 7.1.26).
pub fn chi2_tail(chi2: f64, k: f64) -> f64 {
    if k <= 0.0 || chi2 <= 0.0 {
        return 1.0;
    }
    let z = ((chi2 / k).cbrt() - (1.0 - 2.0 / (9.0 * k))) / (2.0 / (9.0 * k)).sqrt();
    0.5 * erfc(z / std::f64::consts::SQRT_2)
}

fn erfc(x: f64) -> f64 {
    let t = 1.0 / (1.0 + 0.327_591_1 * x.abs());
    let y = (((((1.061_405_429 * t - 1.453_152_027) * t) + 1.421_413_741) * t - 0.284_496_736) * t
        + 0.254_829_592)
        * t
        * (-x * x).exp();
    if x >= 0.0 {
        y
    } else {
        2.0 - y
    }
}

pub(super) fn sky_of(frames: &[FrameInput], d: &Detection) -> Option<(f64, f64)> {
    frames[d.frame]
        .wcs
        .as_ref()
        .map(|w| w.pixel_to_sky(d.x, d.y))
}

pub(super) fn anomaly(
    frames: &[FrameInput],
    kind: AnomalyKind,
    detections: Vec<Detection>,
    detail: Detail,
) -> Anomaly {
    let sky: Vec<(f64, f64)> = detections
        .iter()
        .filter_map(|d| sky_of(frames, d))
        .collect();
    let (ra, dec) = match sky.first() {
        Some(&(ra0, _)) => {
            // Mean position, RA unwrapped around the first detection.
            let n = sky.len() as f64;
            let ra = sky
                .iter()
                .map(|s| ra0 + ((s.0 - ra0 + 540.0).rem_euclid(360.0) - 180.0))
                .sum::<f64>()
                / n;
            let dec = sky.iter().map(|s| s.1).sum::<f64>() / n;
            (Some(ra.rem_euclid(360.0)), Some(dec))
        }
        None => (None, None),
    };
    Anomaly {
        kind,
        ra_deg: ra,
        dec_deg: dec,
        detections,
        detail,
    }
}

/// Every detection of a source, as anomaly detections.
pub(super) fn detections_of(s: &Source) -> Vec<Detection> {
    s.points
        .iter()
        .map(|p| Detection {
            frame: p.frame,
            x: p.x,
            y: p.y,
        })
        .collect()
}

fn distance_to_trail(t: &crate::measure::detect::Trail, x: f64, y: f64) -> f64 {
    let (dx, dy) = (t.x1 - t.x0, t.y1 - t.y0);
    let len2 = (dx * dx + dy * dy).max(1e-9);
    let u = (((x - t.x0) * dx + (y - t.y0) * dy) / len2).clamp(0.0, 1.0);
    (x - (t.x0 + u * dx)).hypot(y - (t.y0 + u * dy))
}

impl Night<'_, '_> {
    /// Inside a streak's own band (its measured width) and a pixel beyond.
    pub fn near_trail(&self, i: usize, x: f64, y: f64) -> bool {
        self.frames[i]
            .trails
            .iter()
            .any(|t| distance_to_trail(t, x, y) < 0.5 * t.width_px.max(self.fwhm) + 1.0)
    }

    /// The frames whose field covers a reference position, `margin` inside the edges.
    pub fn covering(&self, xr: f64, yr: f64, margin: f64) -> Vec<usize> {
        (0..self.n)
            .filter(|&i| {
                self.transforms[i].is_some_and(|t| {
                    covers(
                        &t,
                        self.frames[i].width,
                        self.frames[i].height,
                        xr,
                        yr,
                        margin,
                    )
                })
            })
            .collect()
    }
}

/// Classify what is unusual in the readable frames of one group, each placed on the
/// group's reference (`reference` indexes `frames`), with each frame's transparency loss.
pub fn analyse(
    frames: &[FrameInput],
    placements: &[Option<Placement>],
    transparency_loss: &[Option<f64>],
    reference: usize,
    earlier: &[EarlierNight],
) -> Findings {
    let n = frames.len();
    if n == 0 {
        return Findings::default();
    }
    let mut order: Vec<usize> = (0..n).collect();
    order.sort_by(|&a, &b| {
        frames[a]
            .time_unix
            .unwrap_or(0.0)
            .total_cmp(&frames[b].time_unix.unwrap_or(0.0))
            .then(a.cmp(&b))
    });
    let mut position_in_time = vec![0; n];
    for (k, &i) in order.iter().enumerate() {
        position_in_time[i] = k;
    }
    let transforms: Vec<Option<Affine>> = placements
        .iter()
        .map(|p| p.as_ref().and_then(|p| p.affine()))
        .collect();
    let fwhm =
        median_f64(&frames.iter().filter_map(|f| f.fwhm_px).collect::<Vec<_>>()).unwrap_or(3.0);
    let radius = (0.8 * fwhm).max(1.5);
    let mut tracks = Tracks::new(radius);
    for &i in &order {
        let Some(t) = transforms[i] else { continue };
        let points: Vec<TrackPoint> = frames[i]
            .stars
            .iter()
            .map(|s| {
                let (xr, yr) = t.apply((s.x, s.y));
                TrackPoint {
                    frame: i,
                    x: s.x,
                    y: s.y,
                    xr,
                    yr,
                    flux: s.flux,
                    flux_err: s.flux_err,
                    snr: s.snr,
                    fwhm_px: s.fwhm_px,
                    rgb: super::rgb(s),
                    blended: s.blended,
                }
            })
            .collect();
        tracks.add_frame(&points);
    }
    let mut night = Night {
        frames,
        n,
        times: frames
            .iter()
            .enumerate()
            .map(|(i, f)| f.time_unix.unwrap_or(i as f64 * 60.0))
            .collect(),
        order,
        position_in_time,
        transforms,
        transparency_loss,
        reference,
        fwhm,
        radius,
        edge: 2.0 * fwhm,
        sources: tracks.sources,
        persistent: Vec::new(),
        limits: frames.iter().map(limiting_flux).collect(),
    };
    night.persistent = night
        .sources
        .iter()
        .map(|s| {
            let cover = night.covering(s.xr, s.yr, night.edge).len();
            s.points.len() >= 3 && s.points.len() as f64 >= 0.5 * cover as f64
        })
        .collect();
    let ensemble = ensemble::Ensemble::of(&night);
    let mut anomalies = trails::trails(&night);
    anomalies.extend(sharp::hot_pixels_and_cosmic_rays(&night));
    anomalies.extend(orphans::moving_and_transients(&night));
    anomalies.extend(variables::variables(&night, &ensemble));
    anomalies.extend(color::color_outliers(&night, &ensemble));
    let (mut findings, new) = catalogue::catalogue(&night, &ensemble, earlier);
    anomalies.extend(new);
    anomalies.sort_by_key(|a| a.kind);
    findings.anomalies = anomalies;
    findings
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn variability_index_of_a_worked_series() {
        // Residuals 0.10, −0.10, 0.05, −0.05 mag with σ = 0.05 mag each (worked by hand):
        // χ² = 4 + 4 + 1 + 1 = 10 with 3 degrees of freedom; P(χ²₃ > 10) = 0.0186
        // (closed form for 3 d.o.f., 2Q(√x) + 2φ(√x)√x with Q the normal tail and φ its
        // density: 2·0.000783 + 2·0.002688·3.1623 = 0.0186; the identity from memory).
        let chi2: f64 = [0.10f64, -0.10, 0.05, -0.05]
            .iter()
            .map(|r| (r / 0.05).powi(2))
            .sum();
        assert!((chi2 - 10.0).abs() < 1e-12);
        assert!(
            (chi2_tail(chi2, 3.0) - 0.0186).abs() < 0.002,
            "{}",
            chi2_tail(chi2, 3.0)
        );
    }

    #[test]
    fn chi_square_tail_matches_tables() {
        // χ²₀.₉₅ with 10 d.o.f. is 18.307 and χ²₀.₉₉₉ with 20 d.o.f. is 45.315
        // (standard tables, e.g. Abramowitz & Stegun table 26.8).
        assert!((chi2_tail(18.307, 10.0) - 0.05).abs() < 0.002);
        assert!((chi2_tail(45.315, 20.0) - 0.001).abs() < 0.0003);
        assert!((chi2_tail(10.0, 10.0) - 0.4405).abs() < 0.01);
    }
}
