//! A rendered night with known events: the same star field frame after frame, dithered,
//! turned by a meridian flip, dimmed by a cloud, smeared by a gust, softened by focus
//! drift, crossed by satellites, hit by cosmic rays, with fixed hot pixels, a moving
//! object, a variable star, a brief flash, and (optionally) a new source or a very red
//! star. Pure and seeded. Serves the night analysis tests and the demo.

use ndarray::Array2;
use rand::rngs::StdRng;
use rand::{Rng, SeedableRng};
use rand_distr::Distribution;
use serde::Serialize;

use super::{base_cd, render, PsfShape, Scene, SceneStar, SimParams, SimTruth, TrailSpec};
use crate::frame::bayer::BayerPattern;
use crate::frame::cards::OutValue;
use crate::frame::header::parse_iso_time;

#[derive(Debug, Clone)]
pub struct NightPlan {
    pub seed: u64,
    /// Seed of the star field; two nights of one target share it.
    pub field_seed: u64,
    pub frames: usize,
    pub width: usize,
    pub height: usize,
    pub start: String,
    pub cadence_s: f64,
    pub object: String,
    pub center_deg: (f64, f64),
    pub bayer: Option<BayerPattern>,
    pub star_count: usize,
    /// Frame index from which the field is turned by 180° (meridian flip).
    pub flip_at: Option<usize>,
    pub cloud_frames: Vec<usize>,
    pub gust_frames: Vec<usize>,
    /// From this frame on, the FWHM grows steadily (focus drift).
    pub focus_drift_from: Option<usize>,
    pub trail_frames: Vec<usize>,
    pub cosmic_rays_per_frame: f64,
    pub hot_pixels: usize,
    pub moving_object: bool,
    pub variable_star: bool,
    pub flash_frame: Option<usize>,
    pub new_source: bool,
    pub red_star: bool,
    /// From this frame on, the sky brightens as dawn comes (twilight).
    pub twilight_from: Option<usize>,
    /// The filter named in the headers (monochrome plans).
    pub filter: String,
    /// How this filter sees the field's colors: each star of color index c (drawn per
    /// star from the field's seed, σ 0.25 mag) is brighter by c × `color_term` mag.
    pub color_term: f64,
    /// One star of the field this many times brighter than its color says (a star
    /// bright in one band only); 1 elsewhere.
    pub band_star_factor: Option<f64>,
}

impl NightPlan {
    /// The full monochrome night of the test scenario.
    pub fn full(seed: u64) -> Self {
        NightPlan {
            seed,
            field_seed: 77,
            frames: 40,
            width: 768,
            height: 768,
            start: "2026-03-14T20:40:00".into(),
            cadence_s: 150.0,
            object: "Kestrel Field A".into(),
            center_deg: (84.25, 27.6),
            bayer: None,
            star_count: 260,
            flip_at: Some(20),
            cloud_frames: vec![11, 12, 13],
            gust_frames: vec![7],
            focus_drift_from: Some(32),
            trail_frames: vec![5, 26],
            cosmic_rays_per_frame: 0.75,
            hot_pixels: 10,
            moving_object: true,
            variable_star: true,
            flash_frame: Some(17),
            new_source: false,
            red_star: false,
            twilight_from: None,
            filter: "L".into(),
            color_term: 0.0,
            band_star_factor: None,
        }
    }
}

impl NightPlan {
    /// The same field a night later: calm, twelve frames (the flip of the full plan, at
    /// frame 20, never comes), with one source that was not there before.
    pub fn second_night(seed: u64) -> Self {
        NightPlan {
            seed: seed + 1000,
            start: "2026-03-15T20:40:00".into(),
            new_source: true,
            frames: 12,
            ..NightPlan::full(seed).quiet()
        }
    }

    /// A calm one-shot-color sequence of the second invented target, with one very red
    /// star.
    pub fn color(seed: u64) -> Self {
        NightPlan {
            object: "Kestrel Field B".into(),
            center_deg: (201.3, -12.4),
            field_seed: 91,
            bayer: crate::frame::bayer::BayerPattern::parse("RGGB"),
            red_star: true,
            frames: 10,
            start: "2026-03-15T01:00:00".into(),
            ..NightPlan::full(seed).quiet()
        }
    }

    /// No events: a calm night of the same field (flip, cloud, gust, focus drift,
    /// satellites, moving object, variable and flash all off).
    pub fn quiet(mut self) -> Self {
        self.flip_at = None;
        self.cloud_frames.clear();
        self.gust_frames.clear();
        self.focus_drift_from = None;
        self.trail_frames.clear();
        self.moving_object = false;
        self.variable_star = false;
        self.flash_frame = None;
        self
    }
}

/// One anomaly that was put into the night.
#[derive(Debug, Clone, Serialize)]
pub struct TrueAnomaly {
    pub kind: &'static str,
    /// Frame indices and FITS positions where it shows.
    pub frames: Vec<usize>,
    pub positions: Vec<(f64, f64)>,
    pub note: String,
}

pub struct NightFrame {
    pub name: String,
    pub pixels: Array2<f32>,
    pub keys: Vec<(String, OutValue)>,
    pub truth: SimTruth,
    pub time_unix: f64,
    /// Where the field lies in this frame: p_frame = R(rotation)·(p_ref − c) + c + dither,
    /// 0-based pixels, c the frame centre.
    pub dither: (f64, f64),
    pub rotation_deg: f64,
}

/// Where a reference-frame position (0-based) lands in a frame dithered by `d` and
/// turned by `rot` degrees about the centre `c`.
fn to_frame(p: (f64, f64), c: (f64, f64), d: (f64, f64), rot: f64) -> (f64, f64) {
    let (s, co) = rot.to_radians().sin_cos();
    let (x, y) = (p.0 - c.0, p.1 - c.1);
    (co * x - s * y + c.0 + d.0, s * x + co * y + c.1 + d.1)
}

/// A star of the field, with its color index (mag; the filters' color terms scale it).
#[derive(Debug, Clone, Copy)]
pub struct FieldStar {
    /// In reference pixels (0-based), flux in this plan's filter.
    pub star: SceneStar,
    pub color_mag: f64,
    /// The field's star bright in one band only.
    pub band_star: bool,
}

/// The field of a plan, in its reference frame's pixels: counts rising towards faint
/// stars, each with a color, and the star bright in one band where the plan has one.
/// `field` is the plan's field generator, fresh.
fn field_stars(plan: &NightPlan, field: &mut StdRng) -> Vec<FieldStar> {
    let (w, h) = (plan.width as f64, plan.height as f64);
    let margin = 40.0;
    // Colors from a generator of their own, so fields drawn before colors existed keep
    // their stars.
    let mut colors = StdRng::seed_from_u64(plan.field_seed ^ 0xC010_0125);
    let mut out: Vec<FieldStar> = (0..plan.star_count)
        .map(|_| {
            let u: f64 = field.gen();
            let flux_e = 4000.0 * (400.0f64).powf(u.powf(2.5));
            let x = field.gen_range(-margin..w + margin);
            let y = field.gen_range(-margin..h + margin);
            let t: f64 = field.gen_range(-0.25..0.25);
            let g: f64 = rand_distr::StandardNormal.sample(&mut colors);
            let color_mag = 0.25 * g;
            FieldStar {
                star: SceneStar {
                    x,
                    y,
                    flux_e: flux_e * 10f64.powf(0.4 * color_mag * plan.color_term),
                    rgb: plan.bayer.map(|_| [1.0 + t, 1.0, 1.0 - t]),
                },
                color_mag,
                band_star: false,
            }
        })
        .collect();
    if let Some(factor) = plan.band_star_factor {
        let x = colors.gen_range(0.25 * w..0.75 * w);
        let y = colors.gen_range(0.25 * h..0.75 * h);
        out.push(FieldStar {
            star: SceneStar {
                x,
                y,
                flux_e: 60_000.0 * factor,
                rgb: None,
            },
            color_mag: 0.0,
            band_star: true,
        });
    }
    out
}

/// The field of a plan on the sky, as a catalogue would list it: (RA, Dec) degrees, the
/// flux in electrons per second the plan's filter collects, the color index, and
/// whether it is the star bright in one band only. Positions through the reference
/// frame's WCS (the one the plan's unturned, undithered frame carries).
pub fn field_on_sky(plan: &NightPlan) -> Vec<(f64, f64, f64, f64, bool)> {
    let mut field = StdRng::seed_from_u64(plan.field_seed);
    let c = (
        (plan.width as f64 + 1.0) / 2.0,
        (plan.height as f64 + 1.0) / 2.0,
    );
    let wcs = crate::frame::wcs::Wcs {
        crpix: [c.0, c.1],
        crval: [plan.center_deg.0, plan.center_deg.1],
        cd: base_cd(1.94, 0.0),
        lonpole: 180.0,
        sip: None,
    };
    field_stars(plan, &mut field)
        .into_iter()
        .map(|f| {
            let (ra, dec) = wcs.pixel_to_sky(f.star.x + 1.0, f.star.y + 1.0);
            (ra, dec, f.star.flux_e / 120.0, f.color_mag, f.band_star)
        })
        .collect()
}

pub fn render_night(plan: &NightPlan) -> (Vec<NightFrame>, Vec<TrueAnomaly>) {
    let mut field = StdRng::seed_from_u64(plan.field_seed);
    let mut rng = StdRng::seed_from_u64(plan.seed);
    let (w, h) = (plan.width as f64, plan.height as f64);
    let c = ((w - 1.0) / 2.0, (h - 1.0) / 2.0);
    let mut catalog: Vec<SceneStar> = field_stars(plan, &mut field)
        .into_iter()
        .map(|f| f.star)
        .collect();
    let mut anomalies = Vec::new();
    let inner = |rng: &mut StdRng| {
        (
            rng.gen_range(0.2 * w..0.8 * w),
            rng.gen_range(0.2 * h..0.8 * h),
        )
    };
    // Events placed well inside the field so every frame covers them.
    let variable_at = plan.variable_star.then(|| {
        let p = inner(&mut rng);
        catalog.push(SceneStar {
            x: p.0,
            y: p.1,
            flux_e: 150_000.0,
            rgb: plan.bayer.map(|_| [1.0, 1.0, 1.0]),
        });
        catalog.len() - 1
    });
    let red_at = plan.red_star.then(|| {
        let p = inner(&mut rng);
        catalog.push(SceneStar {
            x: p.0,
            y: p.1,
            flux_e: 120_000.0,
            rgb: Some([3.0, 1.0, 0.2]),
        });
        catalog.len() - 1
    });
    let new_at = plan.new_source.then(|| {
        let p = inner(&mut rng);
        catalog.push(SceneStar {
            x: p.0,
            y: p.1,
            flux_e: 90_000.0,
            rgb: plan.bayer.map(|_| [1.0, 1.0, 1.0]),
        });
        catalog.len() - 1
    });
    let moving_start = inner(&mut rng);
    let moving_velocity = (5.5, 2.0); // reference pixels per frame
    let flash_at = inner(&mut rng);
    let hot: Vec<(usize, usize, f64)> = (0..plan.hot_pixels)
        .map(|_| {
            (
                rng.gen_range(10..plan.width - 10),
                rng.gen_range(10..plan.height - 10),
                rng.gen_range(4000.0..20000.0),
            )
        })
        .collect();
    let start = parse_iso_time(&plan.start).unwrap_or(0.0);

    let mut frames = Vec::with_capacity(plan.frames);
    let mut moving = TrueAnomaly {
        kind: "moving",
        frames: vec![],
        positions: vec![],
        note: "steady motion".into(),
    };
    let mut variable = TrueAnomaly {
        kind: "variable",
        frames: vec![],
        positions: vec![],
        note: "0.5 mag sinusoid".into(),
    };
    let mut red = TrueAnomaly {
        kind: "color",
        frames: vec![],
        positions: vec![],
        note: "very red star".into(),
    };
    let mut new = TrueAnomaly {
        kind: "new_source",
        frames: vec![],
        positions: vec![],
        note: "absent on the earlier night".into(),
    };
    let mut hot_truth: Vec<TrueAnomaly> = hot
        .iter()
        .map(|&(x, y, _)| TrueAnomaly {
            kind: "hot_pixel",
            frames: vec![],
            positions: vec![(x as f64 + 1.0, y as f64 + 1.0)],
            note: "fixed on the detector".into(),
        })
        .collect();
    for i in 0..plan.frames {
        let t = start + i as f64 * plan.cadence_s;
        let dither = (rng.gen_range(-15.0..15.0), rng.gen_range(-15.0..15.0));
        let rot = if plan.flip_at.is_some_and(|f| i >= f) {
            180.0
        } else {
            0.0
        };
        let cloud = plan.cloud_frames.contains(&i);
        let transparency = if cloud { 0.3 } else { 1.0 };
        let fwhm = match plan.focus_drift_from {
            Some(f) if i >= f => 3.0 + 0.3 * (i - f + 1) as f64,
            _ => 3.0,
        };
        let ecc = if plan.gust_frames.contains(&i) {
            0.7
        } else {
            0.1
        };
        let place = |p: (f64, f64)| to_frame(p, c, dither, rot);
        let mut stars: Vec<SceneStar> = catalog
            .iter()
            .enumerate()
            .map(|(k, s)| {
                let (x, y) = place((s.x, s.y));
                let mut flux_e = s.flux_e * transparency;
                if Some(k) == variable_at {
                    // Period 0.6 of the night; ±0.25 mag.
                    let phase = 2.0 * std::f64::consts::PI * i as f64 / (0.6 * plan.frames as f64);
                    flux_e *= 10f64.powf(-0.4 * 0.25 * phase.sin());
                }
                SceneStar {
                    x,
                    y,
                    flux_e,
                    rgb: s.rgb,
                }
            })
            .collect();
        let fits_pos = |p: (f64, f64)| (p.0 + 1.0, p.1 + 1.0);
        if let Some(k) = variable_at {
            variable.frames.push(i);
            variable.positions.push(fits_pos((stars[k].x, stars[k].y)));
        }
        if let Some(k) = red_at {
            red.frames.push(i);
            red.positions.push(fits_pos((stars[k].x, stars[k].y)));
        }
        if let Some(k) = new_at {
            new.frames.push(i);
            new.positions.push(fits_pos((stars[k].x, stars[k].y)));
        }
        if plan.moving_object {
            let p = (
                moving_start.0 + moving_velocity.0 * (i as f64 - plan.frames as f64 / 2.0),
                moving_start.1 + moving_velocity.1 * (i as f64 - plan.frames as f64 / 2.0),
            );
            let (x, y) = place(p);
            if x > 5.0 && y > 5.0 && x < w - 6.0 && y < h - 6.0 {
                stars.push(SceneStar {
                    x,
                    y,
                    flux_e: 60_000.0 * transparency,
                    rgb: plan.bayer.map(|_| [1.0, 1.0, 1.0]),
                });
                if !cloud {
                    moving.frames.push(i);
                    moving.positions.push(fits_pos((x, y)));
                }
            }
        }
        if plan.flash_frame == Some(i) {
            let (x, y) = place(flash_at);
            stars.push(SceneStar {
                x,
                y,
                flux_e: 80_000.0,
                rgb: plan.bayer.map(|_| [1.0, 1.0, 1.0]),
            });
            anomalies.push(TrueAnomaly {
                kind: "transient",
                frames: vec![i],
                positions: vec![fits_pos((x, y))],
                note: "flash".into(),
            });
        }
        let mut trails = Vec::new();
        if plan.trail_frames.contains(&i) {
            let a = (rng.gen_range(0.0..w), 0.0);
            let b = (rng.gen_range(0.0..w), h - 1.0);
            trails.push(TrailSpec {
                from: a,
                to: b,
                flux_per_px_e: 6000.0,
            });
            anomalies.push(TrueAnomaly {
                kind: "trail",
                frames: vec![i],
                positions: vec![fits_pos(((a.0 + b.0) / 2.0, (a.1 + b.1) / 2.0))],
                note: "satellite".into(),
            });
        }
        // Frame WCS: CRPIX where the field centre lands; CD turned with the frame.
        let cd0 = base_cd(1.94, 0.0);
        let (s, co) = rot.to_radians().sin_cos();
        let cd = [
            [
                cd0[0][0] * co + cd0[0][1] * s,
                -cd0[0][0] * s + cd0[0][1] * co,
            ],
            [
                cd0[1][0] * co + cd0[1][1] * s,
                -cd0[1][0] * s + cd0[1][1] * co,
            ],
        ];
        let centre = place(c);
        let cosmic = {
            let whole = plan.cosmic_rays_per_frame.floor() as usize;
            whole + usize::from(rng.gen::<f64>() < plan.cosmic_rays_per_frame.fract())
        };
        let date = chrono::DateTime::from_timestamp(t as i64, 0)
            .map(|d| d.format("%Y-%m-%dT%H:%M:%S").to_string())
            .unwrap_or_default();
        let params = SimParams {
            width: plan.width,
            height: plan.height,
            seed: plan.seed.wrapping_mul(1000).wrapping_add(i as u64),
            psf: PsfShape::Moffat { beta: 3.2 },
            fwhm_px: fwhm,
            eccentricity: ecc,
            angle_deg: 35.0,
            sky_e: (if cloud { 1400.0 } else { 800.0 })
                * match plan.twilight_from {
                    // Twilight sky grows roughly tenfold every 20 minutes (common practice
                    // for the last hour before sunrise); a factor of 2.5 per frame here.
                    Some(f) if i >= f => 2.5f64.powi((i - f + 1) as i32),
                    _ => 1.0,
                },
            gradient: (0.1, 0.05),
            cosmic_rays: cosmic,
            bayer: plan.bayer,
            center_deg: plan.center_deg,
            date_obs: date,
            object: plan.object.clone(),
            filter: plan.filter.clone(),
            scene: Some(Scene {
                stars,
                hot_pixels: hot.clone(),
                trails,
                crpix: Some((centre.0 + 1.0, centre.1 + 1.0)),
                cd: Some(cd),
            }),
            ..Default::default()
        };
        let (pixels, keys, truth) = render(&params);
        for r in &truth.cosmic_rays {
            anomalies.push(TrueAnomaly {
                kind: "transient",
                frames: vec![i],
                positions: vec![(r.x, r.y)],
                note: "cosmic ray".into(),
            });
        }
        for ht in hot_truth.iter_mut() {
            ht.frames.push(i);
        }
        frames.push(NightFrame {
            name: format!(
                "{}{}_{:03}.fits",
                plan.object.to_lowercase().replace(' ', "-"),
                // Filters other than the scenario's usual L are named in the file name.
                if plan.filter == "L" || plan.bayer.is_some() {
                    String::new()
                } else {
                    format!("-{}", plan.filter.to_lowercase())
                },
                i + 1
            ),
            pixels,
            keys,
            truth,
            time_unix: t,
            dither,
            rotation_deg: rot,
        });
    }
    for a in [moving, variable, red, new] {
        if !a.frames.is_empty() {
            anomalies.push(a);
        }
    }
    anomalies.extend(hot_truth.into_iter().filter(|a| !a.frames.is_empty()));
    (frames, anomalies)
}
