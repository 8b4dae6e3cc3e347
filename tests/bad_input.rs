//! Broken and odd files through the real binary: each gets one JSON line with status
//! "error" and a clear reason (or "ok" with no stars where that is the truth), the other
//! files are still measured, and the process never panics or aborts.

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

fn write(dir: &Path, name: &str, bytes: &[u8]) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, bytes).unwrap();
    p
}

#[test]
fn every_bad_file_gets_a_clear_error_and_good_files_still_pass() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let small = SimParams {
        width: 256,
        height: 256,
        star_count: 60,
        ..Default::default()
    };
    let (good, _) = render_to(d, "good.fits", &small, Encoding::Unsigned16);
    let full = std::fs::read(&good).unwrap();

    let empty = write(d, "empty.fits", b"");
    let text = write(d, "notes.fits", b"this is a text file, not an image\n");
    let truncated = write(d, "truncated.fits", &full[..full.len() / 2]);
    let header_only = write(
        d,
        "header-only.fits",
        &header_block(&["SIMPLE = T", "BITPIX = 16", "NAXIS = 0"]),
    );
    let absurd = write(
        d,
        "absurd.fits",
        &header_block(&[
            "SIMPLE = T",
            "BITPIX = 16",
            "NAXIS = 2",
            "NAXIS1 = 4000000000",
            "NAXIS2 = 4000000000",
        ]),
    );
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
    let table = write(d, "table.fits", &table);
    let all_nan = d.join("all-nan.fits");
    write_frame(
        &all_nan,
        &Array2::from_elem((64, 64), f32::NAN),
        Encoding::Float32,
        &[],
    )
    .unwrap();
    let nearly_nan = d.join("nearly-nan.fits");
    let mut few = Array2::from_elem((64, 64), f32::NAN);
    for i in 0..5 {
        few[(10 * i + 3, 7 * i + 2)] = 1000.0 + i as f32;
    }
    write_frame(&nearly_nan, &few, Encoding::Float32, &[]).unwrap();
    let constant = d.join("constant.fits");
    write_frame(
        &constant,
        &Array2::from_elem((64, 64), 1000.0),
        Encoding::Unsigned16,
        &[],
    )
    .unwrap();
    let saturated = d.join("saturated.fits");
    write_frame(
        &saturated,
        &Array2::from_elem((64, 64), 65535.0),
        Encoding::Unsigned16,
        &[],
    )
    .unwrap();
    let missing = d.join("missing.fits");
    let folder = d.to_path_buf();

    let cases: Vec<(&Path, Option<&str>)> = vec![
        (&empty, Some("empty file")),
        (&text, Some("not a FITS file")),
        (&truncated, Some("truncated")),
        (&header_only, Some("no image data")),
        (&absurd, Some("over the limit")),
        (&table, Some("no image data")),
        (&all_nan, Some("no valid pixels")),
        (
            &nearly_nan,
            Some("too few valid pixels to measure (5 of 4096"),
        ),
        (&constant, None),
        (&saturated, None),
        (&missing, Some("No such file")),
        (&folder, Some("not a regular file")),
        (&good, None),
    ];
    let paths: Vec<&Path> = cases.iter().map(|c| c.0).collect();
    let (records, code) = measure(&paths, false);
    assert_eq!(code, 1, "some files failed, so the exit code is 1");
    assert_eq!(records.len(), cases.len(), "one line per input, in order");
    for ((path, expected), rec) in cases.iter().zip(&records) {
        assert_eq!(rec["path"], path.display().to_string());
        match expected {
            Some(words) => {
                assert_eq!(rec["status"], "error", "{rec}");
                let msg = rec["error"].as_str().unwrap();
                assert!(
                    msg.contains(words),
                    "{}: {msg:?} lacks {words:?}",
                    path.display()
                );
                assert!(!msg.contains('\n'), "one line: {msg:?}");
            }
            None => assert_eq!(rec["status"], "ok", "{rec}"),
        }
    }
    // Constant and saturated frames are measured: no stars, honest sky.
    assert_eq!(records[8]["star_count"], 0);
    assert_eq!(records[8]["background_adu"], 1000.0);
    assert_eq!(records[9]["star_count"], 0);
    assert!(records[12]["star_count"].as_u64().unwrap() > 10);
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
