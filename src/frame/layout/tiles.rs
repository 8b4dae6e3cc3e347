//! Tile-compressed images (FITS Standard 4.0, section 10, the convention of Pence, White
//! & Seaman): every keyword a tile decompressor divides by, loops over or indexes with is
//! checked here, in Rust, before cfitsio sees the file. Pure.

use super::{check_pixels, image_shape, Hdu, LayoutError, Promise, BITPIX_VALUES};
use crate::frame::cards::Cards;

/// A tile-compressed image whose keywords passed [`check_compressed`].
#[derive(Debug, Clone, PartialEq)]
pub struct CompressedImage {
    pub hdu: usize,
    pub zbitpix: i32,
    pub width: u64,
    pub height: u64,
    pub algorithm: String,
    pub tiles: u64,
}

/// The compression algorithms of the convention (FITS Standard 4.0, section 10.4).
const ALGORITHMS: [&str; 7] = [
    "RICE_1",
    "RICE_ONE",
    "GZIP_1",
    "GZIP_2",
    "PLIO_1",
    "HCOMPRESS_1",
    "NOCOMPRESS",
];

/// Check every keyword a tile decompressor divides by, loops over or indexes with,
/// before one runs: the image size, the tiles and their count against the table's rows,
/// the algorithm and its parameters, the quantisation, and the table's own shape.
pub fn check_compressed(hdu: &Hdu, limits: Promise) -> Result<CompressedImage, LayoutError> {
    let label = format!("{} (tile-compressed image)", hdu.label());
    let bad = |what: String| LayoutError::Invalid(format!("{label}: {what}"));
    let c = &hdu.cards;
    if hdu.bitpix != 8 || hdu.axes.len() != 2 || hdu.gcount != 1 {
        return Err(bad(
            "the table holding the tiles must have BITPIX = 8, NAXIS = 2 and GCOUNT = 1".into(),
        ));
    }
    let (row_bytes, rows) = (hdu.axes[0], hdu.axes[1]);
    let whole = |key: &str| -> Result<Option<i64>, LayoutError> {
        match c.card(key) {
            None => Ok(None),
            Some(_) => c
                .integer(key)
                .map(Some)
                .ok_or_else(|| bad(format!("{key} is not a whole number"))),
        }
    };
    let zbitpix = whole("ZBITPIX")?.ok_or_else(|| bad("ZBITPIX is missing".into()))?;
    if !BITPIX_VALUES.iter().any(|&b| i64::from(b) == zbitpix) {
        return Err(bad(format!(
            "ZBITPIX = {zbitpix} is not one of 8, 16, 32, 64, -32, -64"
        )));
    }
    let znaxis = whole("ZNAXIS")?.ok_or_else(|| bad("ZNAXIS is missing".into()))?;
    if !(1..=999).contains(&znaxis) {
        return Err(bad(format!("ZNAXIS = {znaxis} is outside 1 to 999")));
    }
    let mut axes = Vec::new();
    let mut tile = Vec::new();
    for n in 1..=znaxis {
        let key = format!("ZNAXIS{n}");
        let size = whole(&key)?.ok_or_else(|| bad(format!("{key} is missing")))?;
        if size <= 0 {
            return Err(bad(format!(
                "{key} = {size}: a compressed image needs a positive size on every axis"
            )));
        }
        let tkey = format!("ZTILE{n}");
        // Default tiles are whole rows (section 10.1.1).
        let t = whole(&tkey)?.unwrap_or(if n == 1 { size } else { 1 });
        if t <= 0 {
            return Err(bad(format!("{tkey} = {t}: tiles need a positive size")));
        }
        axes.push(size as u64);
        tile.push(t as u64);
    }
    let (width, height) = image_shape(&axes, &label)?;
    check_pixels(width, height, limits, &label)?;
    let mut tile_pixels = 1u64;
    let mut tiles = 1u64;
    for (&size, &t) in axes.iter().zip(&tile) {
        tile_pixels = tile_pixels.saturating_mul(t);
        tiles = tiles.saturating_mul(size.div_ceil(t));
    }
    if tile_pixels > limits.max_pixels {
        return Err(bad(format!(
            "tiles of {tile_pixels} pixels are over the limit of {}",
            limits.max_pixels
        )));
    }
    if rows != tiles {
        return Err(bad(format!(
            "the table has {rows} rows but the image is cut into {tiles} tiles (one row per tile)"
        )));
    }
    let algorithm = c
        .text("ZCMPTYPE")
        .ok_or_else(|| bad("ZCMPTYPE (the compression algorithm) is missing".into()))?;
    if !ALGORITHMS.contains(&algorithm.as_str()) {
        return Err(bad(format!(
            "ZCMPTYPE = {algorithm:?} is not one of {}",
            ALGORITHMS.join(", ")
        )));
    }
    if algorithm == "PLIO_1" && zbitpix < 0 {
        return Err(bad("PLIO_1 compresses integer images only".into()));
    }
    // Algorithm parameters: ZNAMEi / ZVALi pairs.
    for i in 1..=999 {
        let Some(name) = c.text(&format!("ZNAME{i}")) else {
            break;
        };
        let value = c.number(&format!("ZVAL{i}"));
        let value =
            value.ok_or_else(|| bad(format!("ZVAL{i} (for {name}) is missing or not a number")))?;
        let ok = match (algorithm.as_str(), name.as_str()) {
            ("RICE_1" | "RICE_ONE", "BLOCKSIZE") => {
                value.fract() == 0.0 && (1.0..=4096.0).contains(&value)
            }
            ("RICE_1" | "RICE_ONE", "BYTEPIX") => [1.0, 2.0, 4.0, 8.0].contains(&value),
            ("HCOMPRESS_1", "SCALE") => value >= 0.0,
            ("HCOMPRESS_1", "SMOOTH") => value == 0.0 || value == 1.0,
            _ => true,
        };
        if !ok {
            return Err(bad(format!(
                "{name} = {value} (ZVAL{i}) is not a valid {algorithm} parameter"
            )));
        }
    }
    if let Some(q) = c.text("ZQUANTIZ") {
        const QUANTIZE: [&str; 4] = [
            "NO_DITHER",
            "SUBTRACTIVE_DITHER_1",
            "SUBTRACTIVE_DITHER_2",
            "NONE",
        ];
        if !QUANTIZE.contains(&q.as_str()) {
            return Err(bad(format!(
                "ZQUANTIZ = {q:?} is not one of {}",
                QUANTIZE.join(", ")
            )));
        }
    }
    // The dither seed indexes a table of 10 000 random numbers (section 10.2).
    if let Some(seed) = whole("ZDITHER0")? {
        if !(1..=10_000).contains(&seed) {
            return Err(bad(format!("ZDITHER0 = {seed} is outside 1 to 10000")));
        }
    }
    check_table_columns(hdu, row_bytes, &bad)?;
    // The compressed bytes of an image are never far above its raw size; a table that
    // promises far more is refused before any of it is read or inflated.
    let raw = width
        .saturating_mul(height)
        .saturating_mul(u64::from(zbitpix.unsigned_abs() as u32 / 8));
    let allowed = raw.saturating_mul(2).saturating_add(64 << 20);
    if hdu.data_bytes > allowed {
        return Err(bad(format!(
            "the table promises {} bytes for an image of {raw} bytes",
            hdu.data_bytes
        )));
    }
    Ok(CompressedImage {
        hdu: hdu.index,
        zbitpix: zbitpix as i32,
        width,
        height,
        algorithm,
        tiles,
    })
}

/// The table's columns: a COMPRESSED_DATA column of variable-length arrays, and row
/// widths that add up to NAXIS1 (section 7.3.1 and Table 18 for the widths).
fn check_table_columns(
    hdu: &Hdu,
    row_bytes: u64,
    bad: &dyn Fn(String) -> LayoutError,
) -> Result<(), LayoutError> {
    let c = &hdu.cards;
    let fields = c
        .integer("TFIELDS")
        .filter(|n| (1..=999).contains(n))
        .ok_or_else(|| bad("TFIELDS is missing or outside 1 to 999".into()))?;
    let mut width = 0u64;
    let mut data_column = false;
    for n in 1..=fields {
        let form = c
            .text(&format!("TFORM{n}"))
            .ok_or_else(|| bad(format!("TFORM{n} is missing")))?;
        let (repeat, code) = split_tform(&form)
            .ok_or_else(|| bad(format!("TFORM{n} = {form:?} is not a column format")))?;
        let bytes = match code {
            'L' | 'B' | 'A' => repeat,
            'X' => repeat.div_ceil(8),
            'I' => repeat * 2,
            'J' | 'E' => repeat * 4,
            'K' | 'D' | 'C' | 'P' => repeat * 8,
            'M' | 'Q' => repeat * 16,
            _ => return Err(bad(format!("TFORM{n} = {form:?} is not a column format"))),
        };
        width = width.saturating_add(bytes);
        if c.text(&format!("TTYPE{n}")).as_deref() == Some("COMPRESSED_DATA") {
            if !matches!(code, 'P' | 'Q') || repeat != 1 {
                return Err(bad(format!(
                    "COMPRESSED_DATA (TFORM{n} = {form:?}) must be a variable-length array"
                )));
            }
            data_column = true;
        }
    }
    if !data_column {
        return Err(bad("there is no COMPRESSED_DATA column".into()));
    }
    if width != row_bytes {
        return Err(bad(format!(
            "rows are NAXIS1 = {row_bytes} bytes but the columns take {width}"
        )));
    }
    if let Some(theap) = c.integer("THEAP") {
        let table = row_bytes.saturating_mul(hdu.axes[1]);
        if theap < 0 || (theap as u64) < table || (theap as u64) > table.saturating_add(hdu.pcount)
        {
            return Err(bad(format!("THEAP = {theap} lies outside the data")));
        }
    }
    Ok(())
}

/// "1PB(276)" → (1, 'P'); "E" → (1, 'E'); "16A" → (16, 'A').
fn split_tform(form: &str) -> Option<(u64, char)> {
    let form = form.trim();
    let digits = form.chars().take_while(|c| c.is_ascii_digit()).count();
    let repeat = if digits == 0 {
        1
    } else {
        form[..digits]
            .parse::<u64>()
            .ok()
            .filter(|r| *r <= 1 << 32)?
    };
    let code = form[digits..].chars().next()?.to_ascii_uppercase();
    Some((repeat, code))
}
