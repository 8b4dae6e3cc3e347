//! Broken and odd files through the real binary, one test per case so a failure names
//! it: each gets one JSON line with status "error" and a clear one-line reason (or "ok"
//! with no stars where that is the truth), a good file given after it is still measured,
//! and the process never panics or aborts.

mod common;

use std::path::{Path, PathBuf};

use common::{measure, render_to};
use ndarray::Array2;
use subwatch::frame::write::{write_frame, Encoding};
use subwatch::sim::SimParams;

/// A FITS header block from "KEY = value" lines (FITS Standard 4.0: 80-column cards,
/// keyword in columns 1-8, "= " in 9-10, padded to 2880 bytes).
fn header_block(lines: &[&str]) -> Vec<u8> {
    let mut text = String::new();
    for l in lines {
        let card = match l.split_once('=') {
            Some((k, v)) => format!("{:<8}= {:>20}", k.trim(), v.trim()),
            None => l.to_string(),
        };
        text.push_str(&format!("{card:<80}"));
    }
    text.push_str(&format!("{:<80}", "END"));
    let mut bytes = text.into_bytes();
    bytes.resize(bytes.len().div_ceil(2880) * 2880, b' ');
    bytes
}

/// A folder with a good frame in it.
struct Case {
    dir: tempfile::TempDir,
    good: PathBuf,
}

impl Case {
    fn new() -> Case {
        let dir = tempfile::tempdir().unwrap();
        let small = SimParams {
            width: 256,
            height: 256,
            star_count: 60,
            ..Default::default()
        };
        let (good, _) = render_to(dir.path(), "good.fits", &small, Encoding::Unsigned16);
        Case { dir, good }
    }

    fn path(&self, name: &str) -> PathBuf {
        self.dir.path().join(name)
    }

    fn write(&self, name: &str, bytes: &[u8]) -> PathBuf {
        let p = self.path(name);
        std::fs::write(&p, bytes).unwrap();
        p
    }

    fn frame(&self, name: &str, pixels: &Array2<f32>, encoding: Encoding) -> PathBuf {
        let p = self.path(name);
        write_frame(&p, pixels, encoding, &[]).unwrap();
        p
    }

    /// Measure `bad` then the good frame; `words` is the reason expected for `bad` (None:
    /// it is measured). Returns `bad`'s record.
    fn expect(&self, bad: &Path, words: Option<&str>) -> serde_json::Value {
        let (records, code) = measure(&[bad, &self.good], false);
        assert_eq!(records.len(), 2, "one line per input, in order");
        assert_eq!(records[0]["path"], bad.display().to_string());
        let rec = records[0].clone();
        match words {
            Some(words) => {
                assert_eq!(code, 1, "a file failed, so the exit code is 1");
                assert_eq!(rec["status"], "error", "{rec}");
                let msg = rec["error"].as_str().unwrap();
                assert!(msg.contains(words), "{msg:?} lacks {words:?}");
                assert!(!msg.contains('\n'), "one line: {msg:?}");
            }
            None => {
                assert_eq!(code, 0);
                assert_eq!(rec["status"], "ok", "{rec}");
            }
        }
        assert_eq!(records[1]["status"], "ok", "the good file after it");
        assert!(records[1]["star_count"].as_u64().unwrap() > 10);
        rec
    }
}

#[test]
fn an_empty_file() {
    let c = Case::new();
    c.expect(&c.write("empty.fits", b""), Some("empty file"));
}

#[test]
fn a_text_file() {
    let c = Case::new();
    let p = c.write("notes.fits", b"this is a text file, not an image\n");
    c.expect(&p, Some("not a FITS file"));
}

#[test]
fn a_file_cut_in_half() {
    let c = Case::new();
    let full = std::fs::read(&c.good).unwrap();
    let p = c.write("truncated.fits", &full[..full.len() / 2]);
    c.expect(&p, Some("truncated"));
}

#[test]
fn a_header_without_data() {
    let c = Case::new();
    let p = c.write(
        "header-only.fits",
        &header_block(&["SIMPLE = T", "BITPIX = 16", "NAXIS = 0"]),
    );
    c.expect(&p, Some("no image data"));
}

#[test]
fn an_absurd_size() {
    let c = Case::new();
    let p = c.write(
        "absurd.fits",
        &header_block(&[
            "SIMPLE = T",
            "BITPIX = 16",
            "NAXIS = 2",
            "NAXIS1 = 4000000000",
            "NAXIS2 = 4000000000",
        ]),
    );
    c.expect(&p, Some("over the limit"));
}

#[test]
fn a_table_and_no_image() {
    let c = Case::new();
    let mut table = header_block(&["SIMPLE = T", "BITPIX = 8", "NAXIS = 0", "EXTEND = T"]);
    table.extend(header_block(&[
        "XTENSION= 'BINTABLE'",
        "BITPIX = 8",
        "NAXIS = 2",
        "NAXIS1 = 4",
        "NAXIS2 = 0",
        "PCOUNT = 0",
        "GCOUNT = 1",
        "TFIELDS = 1",
        "TFORM1 = '1E'",
    ]));
    c.expect(&c.write("table.fits", &table), Some("no image data"));
}

#[test]
fn every_pixel_nan() {
    let c = Case::new();
    let p = c.frame(
        "all-nan.fits",
        &Array2::from_elem((64, 64), f32::NAN),
        Encoding::Float32,
    );
    c.expect(&p, Some("no valid pixels"));
}

#[test]
fn five_valid_pixels_of_4096() {
    let c = Case::new();
    let mut few = Array2::from_elem((64, 64), f32::NAN);
    for i in 0..5 {
        few[(10 * i + 3, 7 * i + 2)] = 1000.0 + i as f32;
    }
    let p = c.frame("nearly-nan.fits", &few, Encoding::Float32);
    c.expect(&p, Some("too few valid pixels to measure (5 of 4096"));
}

#[test]
fn a_constant_frame_is_measured_with_no_stars_and_its_level() {
    let c = Case::new();
    let p = c.frame(
        "constant.fits",
        &Array2::from_elem((64, 64), 1000.0),
        Encoding::Unsigned16,
    );
    let rec = c.expect(&p, None);
    assert_eq!(rec["star_count"], 0);
    assert_eq!(rec["background_adu"], 1000.0);
}

#[test]
fn a_saturated_frame_is_measured_with_no_stars() {
    let c = Case::new();
    let p = c.frame(
        "saturated.fits",
        &Array2::from_elem((64, 64), 65535.0),
        Encoding::Unsigned16,
    );
    assert_eq!(c.expect(&p, None)["star_count"], 0);
}

#[test]
fn a_missing_file() {
    let c = Case::new();
    c.expect(&c.path("missing.fits"), Some("No such file"));
}

#[test]
fn a_folder() {
    let c = Case::new();
    c.expect(c.dir.path(), Some("not a regular file"));
}

#[test]
fn pixel_limit_is_configurable() {
    let dir = tempfile::tempdir().unwrap();
    let small = SimParams {
        width: 128,
        height: 128,
        star_count: 10,
        ..Default::default()
    };
    let (good, _) = render_to(dir.path(), "f.fits", &small, Encoding::Unsigned16);
    let out = std::process::Command::new(common::binary())
        .args(["measure", "--json", "--max-pixels", "10000"])
        .arg(&good)
        .output()
        .unwrap();
    let rec: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(rec["status"], "error");
    assert!(rec["error"]
        .as_str()
        .unwrap()
        .contains("16384 pixels, over the limit of 10000"));
}

/// A batch scheduler, a container or `LimitAS=` in a unit run subwatch under a hard
/// address-space limit of their own; the reader's worker must fit under it, not fail to
/// start (setrlimit cannot raise a hard limit: POSIX getrlimit/setrlimit).
#[cfg(unix)]
#[test]
fn frames_are_measured_under_the_callers_address_space_limit() {
    let frame = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-frames/kfa-001-good.fits");
    for limit_kib in [4_194_304u64, 1_048_576] {
        let (doc, code) = measure_in_address_space(limit_kib, &[frame.as_os_str()]);
        assert_eq!(doc["status"], "ok", "under {limit_kib} KiB: {doc}");
        assert!(doc["star_count"].as_u64().unwrap() > 10, "{doc}");
        assert_eq!(code, Some(0));
    }
}

/// `subwatch measure --json ARGS` in a shell whose address space is `limit_kib` KiB (the
/// hard limit a scheduler or a small computer sets): its one JSON line and exit code.
#[cfg(unix)]
fn measure_in_address_space(
    limit_kib: u64,
    args: &[&std::ffi::OsStr],
) -> (serde_json::Value, Option<i32>) {
    let out = std::process::Command::new("sh")
        .arg("-c")
        .arg(format!(
            "ulimit -v {limit_kib} && exec \"$0\" measure --json \"$@\""
        ))
        .arg(common::binary())
        .args(args)
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    let doc = serde_json::from_str(stdout.trim())
        .unwrap_or_else(|e| panic!("{e}: {stdout} {}", String::from_utf8_lossy(&out.stderr)));
    (doc, out.status.code())
}

/// A full-frame sensor's frame (9576 x 6388, 61 megapixels, 16-bit) on a 4 GB computer at
/// the mount: the reader's automatic limit there is three quarters of the memory, 3 GiB
/// (`reader::Isolation::new`), and the whole process has at most the 4 GiB address space
/// such a computer can give. The frame is measured within both, and measured right: the
/// background and noise the renderer put in (SimTruth), the FWHM it rendered.
#[cfg(unix)]
#[test]
fn a_61_megapixel_frame_is_measured_within_a_4_gb_computers_limits() {
    let dir = tempfile::tempdir().unwrap();
    let params = SimParams {
        width: 9576,
        height: 6388,
        star_count: 3000,
        fwhm_px: 3.2,
        seed: 61,
        ..Default::default()
    };
    let (frame, truth) = render_to(dir.path(), "full-frame.fits", &params, Encoding::Unsigned16);
    let config = dir.path().join("subwatch.toml");
    std::fs::write(
        &config,
        "[watch]\nfolders = ['.']\n[store]\npath = 'subwatch.db'\n[measure]\nreader_memory_mb = 3072\n",
    )
    .unwrap();
    let args = ["--config".as_ref(), config.as_os_str(), frame.as_os_str()];
    let (doc, code) = measure_in_address_space(4_194_304, &args);
    assert_eq!(doc["status"], "ok", "{doc}");
    assert_eq!(code, Some(0));
    assert_eq!(
        (doc["width"].as_u64(), doc["height"].as_u64()),
        (Some(9576), Some(6388))
    );
    let close = |key: &str, want: f64, tolerance: f64| {
        let got = doc[key]
            .as_f64()
            .unwrap_or_else(|| panic!("no {key}: {doc}"));
        assert!(
            (got - want).abs() <= tolerance * want,
            "{key}: measured {got}, rendered {want}"
        );
    };
    close("background_adu", truth.background_adu, 0.01);
    close("noise_adu", truth.noise_adu, 0.05);
    close("fwhm_px", truth.fwhm_px, 0.03);
    assert!(doc["star_count"].as_u64().unwrap() > 500, "{doc}");
}
