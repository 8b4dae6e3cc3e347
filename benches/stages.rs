//! Where the time goes on a large frame: each measurement stage timed on one rendered
//! 6000×4000 frame with 3000 stars (best of a few runs). `cargo bench --bench stages`.
//! For the comparison with sep in the same run, see `benches/measure_bench.py`.

use std::time::Instant;

use subwatch::measure::background::{BackgroundMap, BackgroundParams};
use subwatch::measure::convolve::convolve_separable;
use subwatch::measure::detect::{detect, gaussian_kernel, DetectParams};
use subwatch::measure::{measure_image, MeasureParams};
use subwatch::sim::{render, PsfShape, SimParams};

fn best<T>(runs: usize, mut f: impl FnMut() -> T) -> (f64, T) {
    let mut best = f64::INFINITY;
    let mut out = None;
    for _ in 0..runs {
        let t = Instant::now();
        let v = f();
        best = best.min(t.elapsed().as_secs_f64());
        out = Some(v);
    }
    (best, out.expect("at least one run"))
}

fn main() {
    let params = SimParams {
        width: 6000,
        height: 4000,
        star_count: 3000,
        psf: PsfShape::Moffat { beta: 3.5 },
        fwhm_px: 3.5,
        hot_pixels: 200,
        cosmic_rays: 200,
        seed: 5,
        ..Default::default()
    };
    let (pixels, _, _) = render(&params);
    let runs = 3;
    let (t_bkg, bkg) = best(runs, || {
        BackgroundMap::estimate(&pixels, None, BackgroundParams::default()).unwrap()
    });
    let mut residual = pixels.clone();
    let w = residual.ncols();
    let mut row = vec![0.0f32; w];
    for (y, r) in residual.rows_mut().into_iter().enumerate() {
        bkg.level_row(y, &mut row);
        for (v, l) in r.into_iter().zip(&row) {
            *v -= l;
        }
    }
    let kernel = gaussian_kernel(3.0);
    let (t_conv, _) = best(runs, || convolve_separable(&residual, &kernel));
    let (t_detect, found) = best(runs, || detect(&residual, &bkg, &DetectParams::default()));
    let (t_all, m) = best(runs, || {
        measure_image(pixels.clone(), &MeasureParams::default()).unwrap()
    });
    println!("background mesh + spline setup  {t_bkg:7.3} s");
    println!("matched filter (convolution)    {t_conv:7.3} s");
    println!(
        "detection (filter + components) {t_detect:7.3} s  ({} candidates)",
        found.candidates.len()
    );
    println!(
        "full measurement                {t_all:7.3} s  ({} stars, FWHM {:.3} px)",
        m.star_count,
        m.fwhm_px.unwrap_or(f64::NAN)
    );
}
