//! `subwatch measure`: frames measured one by one, each read by a worker process, as a
//! table or as the contract's JSON Lines.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

use anyhow::Result;
use subwatch::contract::MeasureRecord;
use subwatch::pipeline::{MeasureOptions, RecordOptions};

#[derive(clap::Args)]
pub struct MeasureArgs {
    /// Print one JSON object per file (JSON Lines) instead of a table.
    #[arg(long)]
    json: bool,
    /// Include every measured star in the JSON output (JSON only: a table of thousands
    /// of stars per file helps nobody).
    #[arg(long, requires = "json")]
    stars: bool,
    /// Refuse images with more pixels than this (checked before allocating).
    #[arg(long, default_value_t = 400_000_000)]
    max_pixels: u64,
    /// Focal length (mm) when the header has no FOCALLEN.
    #[arg(long)]
    focal_length_mm: Option<f64>,
    /// Unbinned pixel size (µm) when the header has no XPIXSZ.
    #[arg(long)]
    pixel_size_um: Option<f64>,
    /// Configuration: optics, measuring settings, and the star catalogue ([catalogue]),
    /// with which each frame is fitted to the sky and gets a zero point and depth.
    #[arg(long)]
    config: Option<PathBuf>,
    #[arg(required = true)]
    files: Vec<PathBuf>,
}

pub fn run(args: MeasureArgs) -> Result<ExitCode> {
    let MeasureArgs {
        json,
        stars,
        max_pixels,
        focal_length_mm,
        pixel_size_um,
        config,
        files,
    } = args;
    let (opts, reader) = match config {
        Some(path) => {
            let c = subwatch::config::load(&path)?;
            crate::commands::catalogue::prepare(&c.catalogue);
            let mut opts = RecordOptions::from_config(&c);
            opts.measure_calibration = true;
            opts.measure.focal_length_mm = focal_length_mm.or(opts.measure.focal_length_mm);
            opts.measure.pixel_size_um = pixel_size_um.or(opts.measure.pixel_size_um);
            (opts, subwatch::reader::Reader::from_config(&c.measure))
        }
        None => {
            let mut measure = MeasureOptions {
                focal_length_mm,
                pixel_size_um,
                ..Default::default()
            };
            measure.limits.max_pixels = max_pixels;
            let opts = RecordOptions {
                measure,
                measure_calibration: true,
                ..Default::default()
            };
            let reader = subwatch::reader::Reader::from_config(&subwatch::config::MeasureConfig {
                max_pixels,
                ..Default::default()
            });
            (opts, reader)
        }
    };
    measure_command(&files, &opts, &reader, json, stars)
}

fn measure_command(
    files: &[PathBuf],
    opts: &RecordOptions,
    reader: &subwatch::reader::Reader,
    json: bool,
    with_stars: bool,
) -> Result<ExitCode> {
    let stdout = std::io::stdout();
    let mut out = stdout.lock();
    let mut failed = false;
    if !json {
        writeln!(
            out,
            "{:<40} {:>6} {:>7} {:>7} {:>6} {:>9} {:>8} {:>7}",
            "file", "stars", "fwhm_px", "fwhm_\"", "ecc", "bkg_adu", "noise", "snr"
        )?;
    }
    for path in files {
        let shown = path.display().to_string();
        let identity =
            subwatch::walk::identity(path).unwrap_or_else(|_| subwatch::record::Identity {
                path: shown.clone(),
                size: 0,
                mtime_ns: 0,
            });
        let rec = reader
            .record_once_let_go(path, opts, subwatch::reader::HELD_PATIENCE)
            .unwrap_or_else(|e| subwatch::record::FrameRecord::failed(identity, &e.to_string()));
        let record = match (rec.status, rec.metrics) {
            (subwatch::record::FrameStatus::Ok, Some(metrics)) => MeasureRecord {
                path: shown.clone(),
                status: "ok",
                error: None,
                metrics: Some(metrics),
                header: rec.header,
                stars: with_stars.then_some(rec.stars),
                rejected: with_stars.then_some(rec.rejected),
            },
            _ => MeasureRecord::error(
                &shown,
                rec.error
                    .unwrap_or_else(|| "not measured (no reason given)".into()),
            ),
        };
        // The reason is in the row or the JSON line, once; the exit code tells scripts.
        failed |= record.status != "ok";
        if json {
            serde_json::to_writer(&mut out, &record)?;
            writeln!(out)?;
        } else {
            print_row(&mut out, &record)?;
        }
    }
    Ok(if failed {
        ExitCode::from(1)
    } else {
        ExitCode::SUCCESS
    })
}

fn print_row(out: &mut impl Write, r: &MeasureRecord) -> Result<()> {
    let opt = |v: Option<f64>, p: usize| v.map_or("-".to_string(), |x| format!("{x:.p$}"));
    match &r.metrics {
        Some(m) => writeln!(
            out,
            "{:<40} {:>6} {:>7} {:>7} {:>6} {:>9.1} {:>8.2} {:>7}",
            r.path,
            m.star_count,
            opt(m.fwhm_px, 2),
            opt(m.fwhm_arcsec, 2),
            opt(m.eccentricity, 2),
            m.background_adu,
            m.noise_adu,
            opt(m.snr_median, 1)
        )?,
        None => writeln!(
            out,
            "{:<40} error: {}",
            r.path,
            r.error.as_deref().unwrap_or("unknown")
        )?,
    }
    Ok(())
}
