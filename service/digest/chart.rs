//! The digest's 14-night chart as a small PNG: one bar per 24 h period of
//! independent events, over a pale band for the usual range (0 to
//! `usual_high`) and a line at the expected count.
//!
//! A PNG because mail programs show embedded PNGs (a `cid:` part of a
//! multipart/related message, RFC 2387) and most do not show SVG. No text
//! is drawn: the numbers are in the message beside it and in the image's
//! alt text. Pure: data in, bytes out.

use super::NightTotal;

/// Pixel size of the chart.
pub const WIDTH: u32 = 448;
pub const HEIGHT: u32 = 140;
/// Margin around the plot area, in pixels.
pub const MARGIN: u32 = 8;

/// Colours (RGB): our own quiet palette.
pub const BACKGROUND: [u8; 3] = [0xfb, 0xfa, 0xf6];
pub const BAND: [u8; 3] = [0xe4, 0xe9, 0xdc];
pub const BAR: [u8; 3] = [0x2f, 0x5d, 0x50];
pub const BAR_ABOVE: [u8; 3] = [0xa8, 0x3f, 0x1e];
pub const EXPECTED: [u8; 3] = [0x6b, 0x6b, 0x6b];
pub const AXIS: [u8; 3] = [0x9a, 0x9a, 0x90];

/// The scale: counts per pixel row are `top / plot height`, where `top` is
/// the largest of the events, the usual highs and the expected counts
/// (at least 1), so every bar and band fits.
pub fn top(nights: &[NightTotal]) -> f64 {
    nights
        .iter()
        .map(|n| (n.events as f64).max(n.usual_high as f64).max(n.expected))
        .fold(1.0, f64::max)
}

/// Geometry of bar `i` of `n`: `(x0, x1)` pixel columns, `[x0, x1)`.
pub fn bar_columns(i: usize, n: usize) -> (u32, u32) {
    let plot = WIDTH - 2 * MARGIN;
    let slot = plot / n.max(1) as u32;
    let x0 = MARGIN + slot * i as u32 + slot / 6;
    let x1 = MARGIN + slot * (i as u32 + 1) - slot / 6;
    (x0, x1.max(x0 + 1))
}

/// Height in pixels of a count on the chart's scale.
pub fn height_of(count: f64, top: f64) -> u32 {
    let plot = f64::from(HEIGHT - 2 * MARGIN);
    ((count / top) * plot).round().clamp(0.0, plot) as u32
}

/// The palette, in index order (an indexed PNG: one byte per pixel, and
/// long runs that deflate well, so the image stays a few KiB).
const PALETTE: [[u8; 3]; 6] = [BACKGROUND, BAND, BAR, BAR_ABOVE, EXPECTED, AXIS];

fn index_of(c: [u8; 3]) -> u8 {
    PALETTE.iter().position(|p| *p == c).unwrap_or(0) as u8
}

struct Canvas {
    px: Vec<u8>,
}

impl Canvas {
    fn new() -> Self {
        Canvas {
            px: vec![0; (WIDTH * HEIGHT) as usize],
        }
    }

    /// Fills `[x0, x1) x [y0, y1)` in image coordinates (y down).
    fn fill(&mut self, x0: u32, x1: u32, y0: u32, y1: u32, c: [u8; 3]) {
        let i = index_of(c);
        for y in y0.min(HEIGHT)..y1.min(HEIGHT) {
            let row = (y * WIDTH) as usize;
            self.px[row + x0.min(WIDTH) as usize..row + x1.min(WIDTH) as usize].fill(i);
        }
    }
}

/// The chart as PNG bytes (8-bit indexed colour). The bottom of the plot is the row
/// `HEIGHT - MARGIN`; a bar of `h` pixels fills the `h` rows above it.
pub fn png(nights: &[NightTotal]) -> Vec<u8> {
    let mut c = Canvas::new();
    let top = top(nights);
    let base = HEIGHT - MARGIN;
    let n = nights.len();
    for (i, night) in nights.iter().enumerate() {
        let (x0, x1) = bar_columns(i, n);
        let (bx0, bx1) = (
            x0.saturating_sub(2).max(MARGIN),
            (x1 + 2).min(WIDTH - MARGIN),
        );
        let band = height_of(night.usual_high as f64, top);
        c.fill(bx0, bx1, base - band, base, BAND);
        let h = height_of(night.events as f64, top);
        let colour = if night.events > night.usual_high {
            BAR_ABOVE
        } else {
            BAR
        };
        c.fill(x0, x1, base - h, base, colour);
        let e = height_of(night.expected, top);
        let y = (base - e).clamp(MARGIN, base - 1);
        c.fill(bx0, bx1, y, y + 2, EXPECTED);
    }
    c.fill(MARGIN, WIDTH - MARGIN, base, base + 1, AXIS);
    encode(&c.px)
}

fn encode(px: &[u8]) -> Vec<u8> {
    let mut out = Vec::new();
    let mut enc = png::Encoder::new(&mut out, WIDTH, HEIGHT);
    enc.set_color(png::ColorType::Indexed);
    enc.set_depth(png::BitDepth::Eight);
    enc.set_palette(PALETTE.concat());
    // Writing to a Vec fails only on a size mismatch, which the fixed
    // canvas rules out; an empty result then simply shows no chart.
    if let Ok(mut w) = enc.write_header() {
        if w.write_image_data(px).is_err() {
            return Vec::new();
        }
    }
    out
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use chrono::NaiveDate;

    fn night(d: u32, events: u64, expected: f64, usual_high: u64) -> NightTotal {
        NightTotal {
            date: NaiveDate::from_ymd_opt(2026, 7, d).unwrap(),
            events,
            expected,
            usual_high,
        }
    }

    #[test]
    fn bars_stay_inside_the_plot_and_do_not_touch() {
        for n in 1..=14 {
            let mut last_end = MARGIN;
            for i in 0..n {
                let (x0, x1) = bar_columns(i, n);
                assert!(x0 >= last_end && x1 > x0 && x1 <= WIDTH - MARGIN);
                last_end = x1 + 1;
            }
        }
    }

    #[test]
    fn heights_scale_to_the_tallest_value() {
        let nights = vec![night(1, 2, 0.5, 2), night(2, 10, 0.5, 2)];
        let t = top(&nights);
        assert_eq!(t, 10.0);
        assert_eq!(height_of(10.0, t), HEIGHT - 2 * MARGIN);
        assert_eq!(height_of(0.0, t), 0);
    }

    #[test]
    fn png_has_the_signature_and_size() {
        let nights: Vec<_> = (1..=14)
            .map(|d| night(d, u64::from(d % 4), 1.2, 3))
            .collect();
        let bytes = png(&nights);
        assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n");
        let dec = png::Decoder::new(std::io::Cursor::new(bytes));
        let reader = dec.read_info().unwrap();
        assert_eq!((reader.info().width, reader.info().height), (WIDTH, HEIGHT));
    }
}
