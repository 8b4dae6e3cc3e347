//! Calibration frames with known faults, for the demo and tests: flats (a vignetted
//! field at a chosen share of full scale, photon noise), darks (a level, read noise, the
//! camera's own hot pixels), bias frames; and each fault a night can hold: a flat too
//! faint or too bright, a dust shadow that moved, a dark too warm or too short, a light
//! leak, a noisy bias. Seeded and pure.

use ndarray::Array2;
use rand::SeedableRng;
use rand_distr::{Distribution, Normal};

use crate::frame::cards::OutValue;

/// One calibration frame to write: file name, pixels, header keys.
pub struct CalibrationFrame {
    pub name: String,
    pub pixels: Array2<f32>,
    pub keys: Vec<(String, OutValue)>,
}

/// A fault planted in one frame of the set.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Fault {
    None,
    FlatLevel(f64),
    FlatDust,
    DarkTemperature(f64),
    DarkExposure(f64),
    LightLeak,
    NoisyBias,
}

fn keys(
    kind: &str,
    exposure: f64,
    temp: f64,
    filter: Option<&str>,
    date: &str,
) -> Vec<(String, OutValue)> {
    let mut k = vec![
        ("IMAGETYP".to_string(), OutValue::Text(kind.into())),
        ("EXPTIME".into(), OutValue::Real(exposure)),
        ("CCD-TEMP".into(), OutValue::Real(temp)),
        ("SET-TEMP".into(), OutValue::Real(-10.0)),
        ("XBINNING".into(), OutValue::Int(1)),
        ("YBINNING".into(), OutValue::Int(1)),
        ("DATE-OBS".into(), OutValue::Text(date.into())),
        (
            "INSTRUME".into(),
            OutValue::Text("Kestrel test camera (invented)".into()),
        ),
    ];
    if let Some(f) = filter {
        k.push(("FILTER".into(), OutValue::Text(f.into())));
    }
    k
}

/// A flat at `level` of 65535 (vignetted 20 % to the corners), or a fault of its own.
pub fn flat(size: usize, level: f64, fault: Fault, seed: u64) -> Array2<f32> {
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let unit = Normal::new(0.0, 1.0).expect("a valid normal");
    let level = match fault {
        Fault::FlatLevel(l) => l * 65535.0,
        _ => level * 65535.0,
    };
    let c = size as f64 / 2.0;
    Array2::from_shape_fn((size, size), |(y, x)| {
        let r2 = ((x as f64 - c).powi(2) + (y as f64 - c).powi(2)) / (2.0 * c * c);
        let mut v = level * (1.0 - 0.2 * r2);
        // The dust shadow sits here in this one flat: it moved since the others.
        if fault == Fault::FlatDust
            && (x as f64 - 0.7 * c * 2.0).hypot(y as f64 - 0.3 * c * 2.0) < 0.06 * c * 2.0
        {
            v *= 0.9;
        }
        // Photon noise: σ = √level in ADU at a gain of 1 e⁻/ADU.
        (v + v.sqrt() * unit.sample(&mut rng)).clamp(0.0, 65535.0) as f32
    })
}

/// A dark (or a bias: `level` and `read_noise` of its own) with the camera's hot pixels.
pub fn dark(
    size: usize,
    level: f64,
    read_noise: f64,
    hot: usize,
    fault: Fault,
    seed: u64,
) -> Array2<f32> {
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let noise = if fault == Fault::NoisyBias {
        1.6 * read_noise
    } else {
        read_noise
    };
    let n = Normal::new(level, noise).expect("a valid normal");
    let mut px = Array2::from_shape_fn((size, size), |_| n.sample(&mut rng) as f32);
    // The same hot pixels in every frame of the camera.
    let mut cam = rand::rngs::StdRng::seed_from_u64(4242);
    for _ in 0..hot {
        let (y, x) = (
            rand::Rng::gen_range(&mut cam, 0..size),
            rand::Rng::gen_range(&mut cam, 0..size),
        );
        px[(y, x)] = 30000.0;
    }
    if fault == Fault::LightLeak {
        // A glow from one edge and a few lit spots.
        for ((y, _), v) in px.indexed_iter_mut() {
            *v += 60.0 * (1.0 - y as f32 / size as f32);
        }
        for k in 0..5 {
            let (cy, cx) = (size / 6 * (k + 1), size / 7 * (k + 2));
            for y in cy.saturating_sub(3)..(cy + 4).min(size) {
                for x in cx.saturating_sub(3)..(cx + 4).min(size) {
                    px[(y, x)] += 500.0;
                }
            }
        }
    }
    px
}

/// The demo's calibration set for lights of 120 s at −10 °C through filter L: five good
/// flats, darks and bias frames, and one frame of each fault.
pub fn demo_set(size: usize, date: &str) -> Vec<CalibrationFrame> {
    let mut out = Vec::new();
    let flats = [Fault::None; 5].into_iter().chain([
        Fault::FlatLevel(0.08),
        Fault::FlatLevel(0.95),
        Fault::FlatDust,
    ]);
    for (k, fault) in flats.enumerate() {
        out.push(CalibrationFrame {
            name: format!("flat-l_{:03}.fits", k + 1),
            pixels: flat(size, 0.40, fault, 100 + k as u64),
            keys: keys("Flat Field", 2.0, -10.0, Some("L"), date),
        });
    }
    let darks = [(Fault::None, 120.0, -10.0); 5].into_iter().chain([
        (Fault::DarkTemperature(-4.0), 120.0, -4.0),
        (Fault::DarkExposure(60.0), 60.0, -10.0),
        (Fault::LightLeak, 120.0, -10.0),
    ]);
    for (k, (fault, exposure, temp)) in darks.enumerate() {
        out.push(CalibrationFrame {
            name: format!("dark-120s_{:03}.fits", k + 1),
            pixels: dark(size, 1010.0, 9.0, 40, fault, 200 + k as u64),
            keys: keys("Dark Frame", exposure, temp, None, date),
        });
    }
    for (k, fault) in [Fault::None; 5]
        .into_iter()
        .chain([Fault::NoisyBias])
        .enumerate()
    {
        out.push(CalibrationFrame {
            name: format!("bias_{:03}.fits", k + 1),
            pixels: dark(size, 1000.0, 8.0, 0, fault, 300 + k as u64),
            keys: keys("Bias Frame", 0.0, -10.0, None, date),
        });
    }
    out
}
