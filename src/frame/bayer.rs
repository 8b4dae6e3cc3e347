//! One-shot-color mosaics: the 2×2 color filter pattern named by BAYERPAT, which
//! (by the contract) starts at FITS pixel (1, 1). Pure array reshaping.

use ndarray::Array2;

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Channel {
    Red,
    Green,
    Blue,
}

/// The channel at each position of the 2×2 cell, row-major: [(0,0), (0,1), (1,0), (1,1)]
/// as [row][column] from FITS pixel (1, 1).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct BayerPattern(pub [Channel; 4]);

impl BayerPattern {
    pub fn parse(name: &str) -> Option<Self> {
        let name = name.trim().to_ascii_uppercase();
        let mut cells = [Channel::Green; 4];
        if name.len() != 4 {
            return None;
        }
        for (cell, c) in cells.iter_mut().zip(name.chars()) {
            *cell = match c {
                'R' => Channel::Red,
                'G' => Channel::Green,
                'B' => Channel::Blue,
                _ => return None,
            };
        }
        let count = |ch| cells.iter().filter(|&&c| c == ch).count();
        (count(Channel::Red) == 1 && count(Channel::Blue) == 1 && count(Channel::Green) == 2)
            .then_some(BayerPattern(cells))
    }

    /// (row, column) offset inside the 2×2 cell of the given single channel (red or blue),
    /// or of both green cells.
    pub fn offsets(&self, channel: Channel) -> Vec<(usize, usize)> {
        (0..4)
            .filter(|&i| self.0[i] == channel)
            .map(|i| (i / 2, i % 2))
            .collect()
    }
}

/// Sum of each 2×2 cell: a luminance image at half resolution that keeps all the flux.
/// A trailing odd row or column is dropped.
pub fn superpixel_luminance(mosaic: &Array2<f32>) -> Array2<f32> {
    let (h, w) = (mosaic.nrows() / 2, mosaic.ncols() / 2);
    Array2::from_shape_fn((h, w), |(r, c)| {
        let (r2, c2) = (2 * r, 2 * c);
        mosaic[(r2, c2)] + mosaic[(r2, c2 + 1)] + mosaic[(r2 + 1, c2)] + mosaic[(r2 + 1, c2 + 1)]
    })
}

/// The half-resolution plane of one channel; for green, the mean of the two green cells
/// (so all three planes share the same flux scale per cell).
pub fn channel_plane(mosaic: &Array2<f32>, pattern: BayerPattern, channel: Channel) -> Array2<f32> {
    let (h, w) = (mosaic.nrows() / 2, mosaic.ncols() / 2);
    let offsets = pattern.offsets(channel);
    let n = offsets.len() as f32;
    Array2::from_shape_fn((h, w), |(r, c)| {
        offsets
            .iter()
            .map(|&(dr, dc)| mosaic[(2 * r + dr, 2 * c + dc)])
            .sum::<f32>()
            / n
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn patterns_parse_and_place_their_channels() {
        let p = BayerPattern::parse("rggb").unwrap();
        assert_eq!(p.offsets(Channel::Red), vec![(0, 0)]);
        assert_eq!(p.offsets(Channel::Blue), vec![(1, 1)]);
        assert_eq!(p.offsets(Channel::Green), vec![(0, 1), (1, 0)]);
        assert_eq!(
            BayerPattern::parse("GBRG").unwrap().offsets(Channel::Red),
            vec![(1, 0)]
        );
        assert!(BayerPattern::parse("RGBG2").is_none());
        assert!(BayerPattern::parse("RRGB").is_none());
    }

    #[test]
    fn superpixels_keep_the_flux() {
        let m = Array2::from_shape_fn((4, 6), |(r, c)| (r * 6 + c) as f32);
        let l = superpixel_luminance(&m);
        assert_eq!(l.dim(), (2, 3));
        assert_eq!(l.sum(), m.sum());
        let p = BayerPattern::parse("BGGR").unwrap();
        assert_eq!(channel_plane(&m, p, Channel::Blue)[(0, 0)], 0.0);
        assert_eq!(channel_plane(&m, p, Channel::Red)[(0, 0)], 7.0);
        assert_eq!(channel_plane(&m, p, Channel::Green)[(0, 0)], 3.5);
    }
}
