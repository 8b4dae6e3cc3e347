//! `subwatch render` and `subwatch render-night`: synthetic frames with known truth, for
//! tests and demonstrations.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::{Context, Result};
use clap::ValueEnum;
use subwatch::frame::bayer::BayerPattern;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::{render, PsfShape, SimParams};

#[derive(Clone, Copy, ValueEnum)]
pub enum PsfArg {
    Gaussian,
    Moffat,
}

#[derive(clap::Args)]
pub struct RenderArgs {
    #[arg(long)]
    out: PathBuf,
    /// Where to write the truth as JSON.
    #[arg(long)]
    truth: Option<PathBuf>,
    #[arg(long, default_value_t = 1)]
    seed: u64,
    #[arg(long, default_value_t = 1024)]
    width: usize,
    #[arg(long, default_value_t = 1024)]
    height: usize,
    #[arg(long, default_value_t = 300)]
    stars: usize,
    #[arg(long, value_enum, default_value_t = PsfArg::Moffat)]
    psf: PsfArg,
    /// Optical FWHM in pixels (geometric mean of the axes).
    #[arg(long, default_value_t = 3.5)]
    fwhm: f64,
    #[arg(long, default_value_t = 3.5)]
    beta: f64,
    #[arg(long, default_value_t = 0.0)]
    eccentricity: f64,
    #[arg(long, default_value_t = 0.0)]
    angle: f64,
    /// Sky level in electrons per pixel.
    #[arg(long, default_value_t = 800.0)]
    sky: f64,
    /// Sky change across the frame (fraction of the sky level) along x and y.
    #[arg(long, num_args = 2, value_names = ["GX", "GY"])]
    gradient: Option<Vec<f64>>,
    #[arg(long, default_value_t = 1.0)]
    gain: f64,
    #[arg(long, default_value_t = 0)]
    hot_pixels: usize,
    #[arg(long, default_value_t = 0)]
    cosmic_rays: usize,
    /// Render a one-shot-color mosaic with this pattern (RGGB, BGGR, GRBG, GBRG).
    #[arg(long)]
    bayer: Option<String>,
    /// Store as float32 instead of 16-bit unsigned.
    #[arg(long)]
    float: bool,
    /// OBJECT keyword.
    #[arg(long)]
    object: Option<String>,
    /// DATE-OBS keyword (UTC, ISO 8601).
    #[arg(long)]
    date_obs: Option<String>,
    /// Scale every star's flux by this factor (thin cloud: below 1).
    #[arg(long, default_value_t = 1.0)]
    transparency: f64,
}

/// `subwatch render`: one frame and its truth.
pub fn frame(args: RenderArgs) -> Result<ExitCode> {
    let RenderArgs {
        out,
        truth,
        seed,
        width,
        height,
        stars,
        psf,
        fwhm,
        beta,
        eccentricity,
        angle,
        sky,
        gradient,
        gain,
        hot_pixels,
        cosmic_rays,
        bayer,
        float,
        object,
        date_obs,
        transparency,
    } = args;
    let bayer = match bayer {
        Some(name) => Some(
            BayerPattern::parse(&name)
                .with_context(|| format!("unknown Bayer pattern {name:?}"))?,
        ),
        None => None,
    };
    let defaults = SimParams::default();
    let (lo, hi) = defaults.flux_range_e;
    let params = SimParams {
        object: object.unwrap_or(defaults.object.clone()),
        date_obs: date_obs.unwrap_or(defaults.date_obs.clone()),
        flux_range_e: (lo * transparency, hi * transparency),
        width,
        height,
        seed,
        star_count: stars,
        psf: match psf {
            PsfArg::Gaussian => PsfShape::Gaussian,
            PsfArg::Moffat => PsfShape::Moffat { beta },
        },
        fwhm_px: fwhm,
        eccentricity,
        angle_deg: angle,
        sky_e: sky,
        gradient: gradient.map_or((0.0, 0.0), |g| (g[0], g[1])),
        gain_e_per_adu: gain,
        hot_pixels,
        cosmic_rays,
        bayer,
        ..Default::default()
    };
    let (pixels, keys, t) = render(&params);
    let encoding = if float {
        Encoding::Float32
    } else {
        Encoding::Unsigned16
    };
    write_frame(&out, &pixels, encoding, &keys)?;
    if let Some(path) = truth {
        let text = serde_json::to_string_pretty(&t)?;
        std::fs::write(&path, text).with_context(|| format!("writing {}", path.display()))?;
    }
    Ok(ExitCode::SUCCESS)
}

/// `subwatch render-night`: a night of frames with known events.
/// What `render-night` is asked to change in the scenario's night.
pub struct NightChanges {
    pub frames: Option<usize>,
    /// The first frame's DATE-OBS (UTC, ISO 8601).
    pub start: Option<String>,
    /// Width and height, pixels.
    pub size: Option<usize>,
    pub stars: Option<usize>,
    /// No events: no clouds, gusts, trails, drift, flip, moving object or flash.
    pub quiet: bool,
}

pub fn night(
    out: &Path,
    seed: u64,
    second_night: bool,
    color: bool,
    changes: NightChanges,
) -> Result<ExitCode> {
    use subwatch::sim::night::{render_night, NightPlan};
    let mut plan = if color {
        NightPlan::color(seed)
    } else if second_night {
        NightPlan::second_night(seed)
    } else {
        NightPlan::full(seed)
    };
    if changes.quiet {
        plan = plan.quiet();
    }
    if let Some(n) = changes.frames {
        plan.frames = n;
    }
    if let Some(start) = changes.start {
        if subwatch::frame::header::parse_iso_time(&start).is_none() {
            anyhow::bail!("--start {start:?} is not a time: give UTC as 2026-03-14T20:40:00");
        }
        plan.start = start;
    }
    if let Some(size) = changes.size {
        if size < 64 {
            anyhow::bail!("--size {size} is too small: give at least 64 pixels");
        }
        plan.width = size;
        plan.height = size;
    }
    if let Some(n) = changes.stars {
        plan.star_count = n;
    }
    std::fs::create_dir_all(out).with_context(|| format!("creating {}", out.display()))?;
    let (frames, truth) = render_night(&plan);
    for f in &frames {
        write_frame(&out.join(&f.name), &f.pixels, Encoding::Unsigned16, &f.keys)?;
    }
    let names: Vec<&str> = frames.iter().map(|f| f.name.as_str()).collect();
    let doc = serde_json::json!({"frames": names, "anomalies": truth});
    std::fs::write(out.join("truth.json"), serde_json::to_string_pretty(&doc)?)?;
    Ok(ExitCode::SUCCESS)
}
