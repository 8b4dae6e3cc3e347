//! FITS file structure, pure: header blocks into HDU descriptions (kind, BITPIX, axes,
//! where the data starts and how many bytes it holds), the choice of the image a frame's
//! pixels come from, the tile-compression keywords checked before any decoder sees
//! them, and whether a file holds every byte its headers promise.
//!
//! No I/O: the caller hands over 2880-byte blocks through [`BlockSource`]. Every size is
//! computed with checked arithmetic from values that are themselves checked, so nothing
//! read from a header can divide by zero, overflow, or size an allocation unchecked.
//! References: FITS Standard 4.0 (sections 3.3, 4.4, 7.3 and 10, the tiled image
//! compression convention of Pence, White & Seaman). Longer than most modules because of
//! its tests (every way a header can lie has one); the compression keywords are checked in
//! its child `tiles`.

mod tiles;

use super::cards::{card_text, keyword, parse_card, Cards, HeaderCard};
pub use tiles::{check_compressed, CompressedImage};

/// A FITS logical record (section 3.1).
pub const BLOCK: u64 = 2880;
/// A header longer than this many blocks (about 36 000 cards) is refused.
pub const MAX_HEADER_BLOCKS: u64 = 1000;
/// At most this many HDUs are walked looking for the image.
pub const MAX_HDUS: usize = 1000;

/// Supplies the blocks of a file, wherever they come from (a file, an inflated stream).
pub trait BlockSource {
    /// The 2880 bytes at `offset`; `Ok(None)` when the bytes end before the block does.
    fn block(&mut self, offset: u64) -> Result<Option<Box<[u8; 2880]>>, String>;
}

/// Why a structure could not be read.
#[derive(Debug, Clone, PartialEq)]
pub enum LayoutError {
    /// The bytes end before what the headers promise (a file still being written, or cut).
    Truncated(String),
    /// The headers break the standard, or promise something refused (a plain-words reason).
    Invalid(String),
}

impl LayoutError {
    pub fn reason(&self) -> &str {
        match self {
            LayoutError::Truncated(s) | LayoutError::Invalid(s) => s,
        }
    }
}

impl std::fmt::Display for LayoutError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.reason())
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HduKind {
    Primary,
    Image,
    BinTable,
    AsciiTable,
    /// An extension type this program does not read.
    Other,
}

/// One header-data unit as its header describes it.
#[derive(Debug, Clone)]
pub struct Hdu {
    /// 0-based position in the file.
    pub index: usize,
    pub header_start: u64,
    pub data_start: u64,
    /// Value cards of the header (comment cards left out).
    pub cards: Vec<HeaderCard>,
    pub kind: HduKind,
    pub bitpix: i32,
    /// NAXIS1, NAXIS2, ...
    pub axes: Vec<u64>,
    pub pcount: u64,
    pub gcount: u64,
    /// Bytes of data the header promises, before padding.
    pub data_bytes: u64,
}

impl Hdu {
    /// Where the next HDU starts: the data padded to a whole block (section 3.3.2).
    pub fn next_start(&self) -> Option<u64> {
        self.data_start.checked_add(padded(self.data_bytes)?)
    }

    pub fn data_end(&self) -> u64 {
        self.data_start.saturating_add(self.data_bytes)
    }

    /// A 1-based name for messages ("HDU 1" is the primary).
    pub fn label(&self) -> String {
        format!("HDU {}", self.index + 1)
    }

    fn is_compressed_image(&self) -> bool {
        self.kind == HduKind::BinTable && self.cards.logical("ZIMAGE") == Some(true)
    }
}

/// `n` bytes rounded up to whole blocks.
pub fn padded(n: u64) -> Option<u64> {
    n.checked_add(BLOCK - 1).map(|v| v / BLOCK * BLOCK)
}

pub(super) const BITPIX_VALUES: [i32; 6] = [8, 16, 32, 64, -32, -64];

/// Read the header of the HDU that starts at `start`.
pub fn read_hdu(
    source: &mut dyn BlockSource,
    start: u64,
    index: usize,
) -> Result<Hdu, LayoutError> {
    let label = format!("HDU {}", index + 1);
    let mut raw_cards: Vec<[u8; 80]> = Vec::new();
    let mut blocks = 0u64;
    'blocks: loop {
        if blocks == MAX_HEADER_BLOCKS {
            return Err(LayoutError::Invalid(format!(
                "{label}: no END card within {MAX_HEADER_BLOCKS} header blocks"
            )));
        }
        let offset = start + blocks * BLOCK;
        let block = source.block(offset).map_err(LayoutError::Invalid)?;
        let Some(block) = block else {
            return Err(LayoutError::Truncated(format!(
                "{label}: the file ends inside the header (no END card)"
            )));
        };
        blocks += 1;
        for raw in block.chunks_exact(80) {
            if keyword(raw) == "END" {
                break 'blocks;
            }
            raw_cards.push(raw.try_into().expect("80-byte chunks"));
        }
    }
    let first = raw_cards.first().map(|c| keyword(c)).unwrap_or_default();
    let expected = if index == 0 { "SIMPLE" } else { "XTENSION" };
    if first != expected {
        return Err(LayoutError::Invalid(format!(
            "{label}: the header must begin with {expected} (found {first:?})"
        )));
    }
    let cards: Vec<HeaderCard> = raw_cards
        .iter()
        .filter_map(|c| parse_card(&card_text(c)))
        .collect();
    let kind = if index == 0 {
        if cards.logical("SIMPLE") != Some(true) {
            return Err(LayoutError::Invalid(format!(
                "{label}: SIMPLE is not T (the file says it does not conform to the FITS standard)"
            )));
        }
        HduKind::Primary
    } else {
        match cards.text("XTENSION").as_deref() {
            Some("IMAGE") => HduKind::Image,
            Some("BINTABLE") | Some("A3DTABLE") => HduKind::BinTable,
            Some("TABLE") => HduKind::AsciiTable,
            _ => HduKind::Other,
        }
    };
    let bitpix = mandatory_integer(&cards, &label, "BITPIX")?;
    if !BITPIX_VALUES.iter().any(|&b| i64::from(b) == bitpix) {
        return Err(LayoutError::Invalid(format!(
            "{label}: BITPIX = {bitpix} is not one of 8, 16, 32, 64, -32, -64"
        )));
    }
    let naxis = mandatory_integer(&cards, &label, "NAXIS")?;
    if !(0..=999).contains(&naxis) {
        return Err(LayoutError::Invalid(format!(
            "{label}: NAXIS = {naxis} is outside 0 to 999"
        )));
    }
    let bitpix = bitpix as i32;
    let mut axes = Vec::with_capacity(naxis as usize);
    for n in 1..=naxis {
        let key = format!("NAXIS{n}");
        let v = mandatory_integer(&cards, &label, &key)?;
        axes.push(
            u64::try_from(v)
                .map_err(|_| LayoutError::Invalid(format!("{label}: {key} = {v} is negative")))?,
        );
    }
    let (pcount, gcount) = if index == 0 {
        let groups = cards.logical("GROUPS") == Some(true) && axes.first() == Some(&0);
        if groups {
            (
                non_negative(&cards, &label, "PCOUNT", 0)?,
                non_negative(&cards, &label, "GCOUNT", 1)?,
            )
        } else {
            (0, 1)
        }
    } else {
        (
            non_negative(&cards, &label, "PCOUNT", 0)?,
            non_negative(&cards, &label, "GCOUNT", 1)?,
        )
    };
    let overflow = || {
        LayoutError::Invalid(format!(
            "{label}: the axes promise more data than any file can hold (the data size overflows, over the limit of 2^64 bytes)"
        ))
    };
    let data_bytes = if axes.is_empty() {
        0
    } else {
        // Random groups leave NAXIS1 (= 0) out of the product (section 6).
        let random_groups = index == 0 && axes[0] == 0 && cards.logical("GROUPS") == Some(true);
        let counted = if random_groups { &axes[1..] } else { &axes[..] };
        let mut product = 1u64;
        for &a in counted {
            product = product.checked_mul(a).ok_or_else(overflow)?;
        }
        (bitpix.unsigned_abs() as u64 / 8)
            .checked_mul(gcount)
            .and_then(|v| v.checked_mul(pcount.checked_add(product)?))
            .ok_or_else(overflow)?
    };
    let data_start = start.checked_add(blocks * BLOCK).ok_or_else(overflow)?;
    let hdu = Hdu {
        index,
        header_start: start,
        data_start,
        cards,
        kind,
        bitpix,
        axes,
        pcount,
        gcount,
        data_bytes,
    };
    hdu.next_start().ok_or_else(overflow)?;
    Ok(hdu)
}

fn mandatory_integer(cards: &[HeaderCard], label: &str, key: &str) -> Result<i64, LayoutError> {
    let v = match cards.card(key) {
        None => {
            return Err(LayoutError::Invalid(format!(
                "{label}: the mandatory keyword {key} is missing"
            )))
        }
        Some(_) => cards.integer(key),
    };
    v.ok_or_else(|| LayoutError::Invalid(format!("{label}: {key} is not a whole number")))
}

fn non_negative(
    cards: &[HeaderCard],
    label: &str,
    key: &str,
    default: u64,
) -> Result<u64, LayoutError> {
    match cards.card(key) {
        None => Ok(default),
        Some(_) => cards
            .integer(key)
            .and_then(|v| u64::try_from(v).ok())
            .ok_or_else(|| {
                LayoutError::Invalid(format!("{label}: {key} is not a whole number of 0 or more"))
            }),
    }
}

/// The image a frame's pixels come from.
#[derive(Debug, Clone)]
pub enum ImageHdu {
    /// Pixels stored as they are.
    Plain(PlainImage),
    /// A tile-compressed image (a binary table underneath), its keywords checked.
    Compressed(CompressedImage),
}

/// An uncompressed image: where its pixels are and how to scale them (section 4.4.2).
#[derive(Debug, Clone, PartialEq)]
pub struct PlainImage {
    pub hdu: usize,
    pub data_start: u64,
    pub bitpix: i32,
    pub width: u64,
    pub height: u64,
    pub zero: f64,
    pub scale: f64,
    /// Integer images: the stored value that marks an undefined pixel.
    pub blank: Option<i64>,
}

impl PlainImage {
    pub fn pixels(&self) -> u64 {
        self.width * self.height
    }
    pub fn bytes(&self) -> u64 {
        self.pixels() * u64::from(self.bitpix.unsigned_abs() / 8)
    }
}

/// Limits applied to what headers promise, before anything is read or allocated.
#[derive(Debug, Clone, Copy)]
pub struct Promise {
    pub max_pixels: u64,
}

impl Promise {
    /// The most bytes an image within the limit can need: every pixel as BITPIX -64.
    pub fn max_image_bytes(&self) -> u64 {
        self.max_pixels.saturating_mul(8)
    }
}

/// Walk the HDUs from the start of the file to the first image with data. Returns the
/// HDUs walked (the image's last) and the image. Headers without data, tables and empty
/// images are passed over, as the standard allows a primary HDU with no data before an
/// image extension.
pub fn find_image(
    source: &mut dyn BlockSource,
    limits: Promise,
) -> Result<(Vec<Hdu>, ImageHdu), LayoutError> {
    let mut hdus: Vec<Hdu> = Vec::new();
    let mut seen: Vec<&'static str> = Vec::new();
    let mut start = 0u64;
    for index in 0..MAX_HDUS {
        if index > 0 {
            // The end of the file, or trailing bytes that are not an extension: no more HDUs.
            match source.block(start).map_err(LayoutError::Invalid)? {
                Some(b) if b.starts_with(b"XTENSION") => {}
                _ => break,
            }
        }
        let hdu = read_hdu(source, start, index)?;
        start = hdu.next_start().unwrap_or(u64::MAX);
        let choice = match hdu.kind {
            HduKind::Primary | HduKind::Image => plain_image(&hdu, limits)?.map(ImageHdu::Plain),
            HduKind::BinTable if hdu.is_compressed_image() => {
                Some(ImageHdu::Compressed(check_compressed(&hdu, limits)?))
            }
            HduKind::BinTable => {
                seen.push("binary table");
                None
            }
            HduKind::AsciiTable => {
                seen.push("ASCII table");
                None
            }
            HduKind::Other => {
                seen.push("unknown extension");
                None
            }
        };
        if choice.is_none() && matches!(hdu.kind, HduKind::Primary | HduKind::Image) {
            seen.push(if hdu.axes.is_empty() {
                "header without data"
            } else {
                "empty image"
            });
        }
        hdus.push(hdu);
        if let Some(image) = choice {
            return Ok((hdus, image));
        }
    }
    Err(LayoutError::Invalid(if seen.is_empty() {
        "no HDU with image data".into()
    } else {
        format!("no image data (found: {})", seen.join(", "))
    }))
}

/// The image of a primary or IMAGE HDU, `None` when it holds no pixels.
fn plain_image(hdu: &Hdu, limits: Promise) -> Result<Option<PlainImage>, LayoutError> {
    let label = hdu.label();
    let axes = &hdu.axes;
    if axes.is_empty() || axes.contains(&0) {
        return Ok(None);
    }
    if hdu.kind == HduKind::Primary && hdu.cards.logical("GROUPS") == Some(true) {
        return Ok(None);
    }
    let (width, height) = image_shape(axes, &label)?;
    check_pixels(width, height, limits, &label)?;
    let number = |key: &str, default: f64| -> Result<f64, LayoutError> {
        match hdu.cards.card(key) {
            None => Ok(default),
            Some(_) => hdu.cards.number(key).ok_or_else(|| {
                LayoutError::Invalid(format!("{label}: {key} is not a finite number"))
            }),
        }
    };
    let blank =
        if hdu.bitpix > 0 && hdu.cards.card("BLANK").is_some() {
            Some(hdu.cards.integer("BLANK").ok_or_else(|| {
                LayoutError::Invalid(format!("{label}: BLANK is not a whole number"))
            })?)
        } else {
            None
        };
    Ok(Some(PlainImage {
        hdu: hdu.index,
        data_start: hdu.data_start,
        bitpix: hdu.bitpix,
        width,
        height,
        zero: number("BZERO", 0.0)?,
        scale: number("BSCALE", 1.0)?,
        blank,
    }))
}

/// (width, height) of a 2-D image, or of a 3-D cube with a single plane.
pub(super) fn image_shape(axes: &[u64], label: &str) -> Result<(u64, u64), LayoutError> {
    match axes {
        [w, h] => Ok((*w, *h)),
        [w, h, 1] => Ok((*w, *h)),
        [_, _, planes] => Err(LayoutError::Invalid(format!(
            "{label} is a {planes}-plane cube; color-separated cubes are not supported (one plane expected)"
        ))),
        _ => Err(LayoutError::Invalid(format!(
            "{label} has NAXIS = {}; only 2-D images (or a 3-D cube with one plane) are supported",
            axes.len()
        ))),
    }
}

pub(super) fn check_pixels(
    width: u64,
    height: u64,
    limits: Promise,
    label: &str,
) -> Result<u64, LayoutError> {
    let pixels = width.saturating_mul(height);
    if pixels > limits.max_pixels {
        return Err(LayoutError::Invalid(format!(
            "{label}: image is {width} x {height} = {pixels} pixels, over the limit of {} (raise max_pixels if this is real)",
            limits.max_pixels
        )));
    }
    Ok(pixels)
}

/// Whether a file of `len` bytes holds every byte its headers promise: each header up
/// to END and each HDU's data padded to a whole block (section 3.3.2), so a file whose
/// last block of padding is not yet written is not complete. Trailing bytes after the
/// last HDU that do not begin an extension promise nothing more. `None` when the
/// headers cannot be read as FITS at all (only the settle time can decide then).
pub fn is_complete(source: &mut dyn BlockSource, len: u64) -> Option<bool> {
    let mut start = 0u64;
    for index in 0..MAX_HDUS {
        if index > 0 {
            if start == len {
                return Some(true);
            }
            match source.block(start) {
                Ok(Some(b)) if b.starts_with(b"XTENSION") => {}
                // A partial block at the end may be the next extension being written.
                Ok(None) => return Some(false),
                Ok(Some(_)) => return Some(true),
                Err(_) => return None,
            }
        }
        let hdu = match read_hdu(source, start, index) {
            Ok(h) => h,
            Err(LayoutError::Truncated(_)) => return Some(false),
            Err(LayoutError::Invalid(_)) => return None,
        };
        start = hdu.next_start()?;
        if start > len {
            return Some(false);
        }
    }
    None
}

#[cfg(test)]
pub(crate) mod tests {
    use super::*;

    /// A header block from "KEY = value" lines (80-column cards padded to 2880 bytes).
    pub fn header(lines: &[&str]) -> Vec<u8> {
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

    /// Blocks from a byte vector (a short final block counts as missing).
    pub struct Bytes(pub Vec<u8>);

    impl BlockSource for Bytes {
        fn block(&mut self, offset: u64) -> Result<Option<Box<[u8; 2880]>>, String> {
            let o = offset as usize;
            Ok(self
                .0
                .get(o..o + 2880)
                .map(|b| Box::new(b.try_into().unwrap())))
        }
    }

    const LIMIT: Promise = Promise {
        max_pixels: 400_000_000,
    };

    fn image(w: u64, h: u64) -> Vec<u8> {
        let mut f = header(&[
            "SIMPLE = T",
            "BITPIX = 16",
            "NAXIS = 2",
            &format!("NAXIS1 = {w}"),
            &format!("NAXIS2 = {h}"),
            "BZERO = 32768",
        ]);
        f.resize(f.len() + (w * h * 2) as usize, 0);
        f.resize(f.len().div_ceil(2880) * 2880, 0);
        f
    }

    /// The tiled table of a compressed 300 x 200 image, as a common writer lays it out.
    fn compressed(changes: &[(&str, &str)]) -> Vec<u8> {
        let mut cards = vec![
            ("XTENSION", "'BINTABLE'"),
            ("BITPIX", "8"),
            ("NAXIS", "2"),
            ("NAXIS1", "8"),
            ("NAXIS2", "200"),
            ("PCOUNT", "53520"),
            ("GCOUNT", "1"),
            ("TFIELDS", "1"),
            ("ZIMAGE", "T"),
            ("ZBITPIX", "16"),
            ("ZNAXIS", "2"),
            ("ZNAXIS1", "300"),
            ("ZNAXIS2", "200"),
            ("ZTILE1", "300"),
            ("ZTILE2", "1"),
            ("ZCMPTYPE", "'RICE_1'"),
            ("ZNAME1", "'BLOCKSIZE'"),
            ("ZVAL1", "32"),
            ("ZNAME2", "'BYTEPIX'"),
            ("ZVAL2", "2"),
            ("TTYPE1", "'COMPRESSED_DATA'"),
            ("TFORM1", "'1PB(276)'"),
        ];
        for (k, v) in changes {
            match cards.iter_mut().find(|(key, _)| key == k) {
                Some(card) if v.is_empty() => card.1 = "",
                Some(card) => card.1 = v,
                None => cards.push((k, v)),
            }
        }
        let lines: Vec<String> = cards
            .iter()
            .filter(|(_, v)| !v.is_empty())
            .map(|(k, v)| format!("{k} = {v}"))
            .collect();
        let refs: Vec<&str> = lines.iter().map(|s| s.as_str()).collect();
        let mut f = header(&["SIMPLE = T", "BITPIX = 8", "NAXIS = 0", "EXTEND = T"]);
        f.extend(header(&refs));
        f.resize(f.len() + 8 * 200 + 53520, 0);
        f.resize(f.len().div_ceil(2880) * 2880, 0);
        f
    }

    fn check(bytes: Vec<u8>) -> Result<ImageHdu, String> {
        find_image(&mut Bytes(bytes), LIMIT)
            .map(|(_, i)| i)
            .map_err(|e| e.reason().to_string())
    }

    #[test]
    fn a_plain_image_is_found_with_its_scaling() {
        let Ok(ImageHdu::Plain(p)) = check(image(30, 20)) else {
            panic!()
        };
        assert_eq!(
            (p.width, p.height, p.bitpix, p.zero, p.scale),
            (30, 20, 16, 32768.0, 1.0)
        );
        assert_eq!(p.data_start, 2880);
    }

    #[test]
    fn a_well_formed_compressed_image_passes() {
        let Ok(ImageHdu::Compressed(c)) = check(compressed(&[])) else {
            panic!()
        };
        assert_eq!((c.width, c.height, c.tiles, c.zbitpix), (300, 200, 200, 16));
    }

    #[test]
    fn compression_keywords_that_would_divide_by_zero_or_overrun_are_refused() {
        let cases: [(&[(&str, &str)], &str); 14] = [
            (&[("ZTILE1", "0")], "ZTILE1 = 0"),
            (&[("ZTILE2", "0")], "ZTILE2 = 0"),
            (&[("ZTILE2", "-3")], "ZTILE2 = -3"),
            (&[("ZNAXIS1", "0"), ("ZTILE1", "")], "ZNAXIS1 = 0"),
            (&[("ZVAL1", "0")], "BLOCKSIZE = 0"),
            (&[("ZVAL2", "3")], "BYTEPIX = 3"),
            (&[("ZBITPIX", "12")], "ZBITPIX = 12"),
            (&[("ZCMPTYPE", "'LZW_9'")], "ZCMPTYPE"),
            (
                &[("NAXIS2", "199")],
                "199 rows but the image is cut into 200 tiles",
            ),
            (&[("ZNAXIS", "0")], "ZNAXIS = 0"),
            (&[("ZDITHER0", "20000")], "ZDITHER0"),
            (&[("TFORM1", "'1E'")], "variable-length"),
            (&[("NAXIS1", "16")], "rows are NAXIS1 = 16"),
            (
                &[("ZNAXIS1", "4000000000"), ("ZTILE1", "1")],
                "over the limit",
            ),
        ];
        for (changes, words) in cases {
            let err = check(compressed(changes)).unwrap_err();
            assert!(err.contains(words), "{changes:?}: {err:?} lacks {words:?}");
            assert!(!err.contains('\n'));
        }
    }

    #[test]
    fn absurd_structure_is_refused_with_a_reason() {
        let cases: [(&[&str], &str); 6] = [
            (
                &[
                    "SIMPLE = T",
                    "BITPIX = 7",
                    "NAXIS = 2",
                    "NAXIS1 = 2",
                    "NAXIS2 = 2",
                ],
                "BITPIX = 7",
            ),
            (
                &["SIMPLE = T", "BITPIX = 16", "NAXIS = 1000"],
                "NAXIS = 1000",
            ),
            (
                &[
                    "SIMPLE = T",
                    "BITPIX = 16",
                    "NAXIS = 2",
                    "NAXIS1 = -2",
                    "NAXIS2 = 2",
                ],
                "negative",
            ),
            (
                &["SIMPLE = T", "BITPIX = 16", "NAXIS = 2", "NAXIS1 = 2"],
                "NAXIS2 is missing",
            ),
            (
                &[
                    "SIMPLE = T",
                    "BITPIX = 64",
                    "NAXIS = 3",
                    "NAXIS1 = 4000000000",
                    "NAXIS2 = 4000000000",
                    "NAXIS3 = 4000000000",
                ],
                "overflows",
            ),
            (
                &["SIMPLE = F", "BITPIX = 16", "NAXIS = 0"],
                "SIMPLE is not T",
            ),
        ];
        for (lines, words) in cases {
            let err = check(header(lines)).unwrap_err();
            assert!(err.contains(words), "{lines:?}: {err:?} lacks {words:?}");
        }
        // A header with no END runs off the end of the file.
        let mut no_end = image(8, 8);
        let at = no_end.windows(3).position(|w| w == b"END").unwrap();
        no_end[at..at + 3].copy_from_slice(b"   ");
        assert!(check(no_end).unwrap_err().contains("no END"));
    }

    #[test]
    fn a_file_is_complete_only_with_its_final_padding() {
        let full = image(30, 20);
        let data_end = 2880 + 30 * 20 * 2;
        for (len, want) in [
            (0, Some(false)),
            (1000, Some(false)),
            (2880, Some(false)),
            (data_end, Some(false)),
            (full.len(), Some(true)),
        ] {
            let mut src = Bytes(full[..len].to_vec());
            assert_eq!(is_complete(&mut src, len as u64), want, "{len} bytes");
        }
        // Trailing bytes that are not an extension promise nothing more.
        let mut junk = full.clone();
        junk.extend(vec![0u8; 2880]);
        let n = junk.len() as u64;
        assert_eq!(is_complete(&mut Bytes(junk), n), Some(true));
        // An extension still being written is not complete.
        let mut two = full.clone();
        two.extend(&header(&[
            "XTENSION = 'IMAGE'",
            "BITPIX = 16",
            "NAXIS = 2",
            "NAXIS1 = 10",
            "NAXIS2 = 10",
        ]));
        let n = two.len() as u64;
        assert_eq!(is_complete(&mut Bytes(two), n), Some(false));
    }
}
