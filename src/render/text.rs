//! Text in pictures: DejaVu Sans Mono, bundled in the binary by the `dejavu`
//! crate (DejaVu fonts licence: free to use, copy and embed, from the
//! Bitstream Vera licence), drawn with imageproc's text drawing over ab_glyph.
//! No system font is needed, and every printable ASCII character has its own
//! glyph (`|`, `~`, `{`, `}` included). Text is antialiased: each pixel is
//! blended with the ink by the glyph's coverage.

use std::sync::OnceLock;

use ab_glyph::{FontRef, PxScale};
use image::{Rgb, RgbImage};

/// Pixel height of the font: the em square, about 9 px of capital height.
pub const TEXT_PX: f32 = 13.0;
/// Height of one line of text, with its leading.
pub const LINE: u32 = 15;

fn font() -> &'static FontRef<'static> {
    static FONT: OnceLock<FontRef<'static>> = OnceLock::new();
    FONT.get_or_init(|| {
        FontRef::try_from_slice(dejavu::sans_mono::regular()).expect("the bundled font parses")
    })
}

/// Width in pixels of `text` drawn with [`draw_text`].
pub fn text_width(text: &str) -> u32 {
    imageproc::drawing::text_size(PxScale::from(TEXT_PX), font(), text).0
}

/// Draws `text` with its top at (x, y), clipped to the image.
pub fn draw_text(img: &mut RgbImage, x: u32, y: u32, text: &str, ink: Rgb<u8>) {
    let (x, y) = (
        i32::try_from(x).unwrap_or(i32::MAX),
        i32::try_from(y).unwrap_or(i32::MAX),
    );
    imageproc::drawing::draw_text_mut(img, ink, x, y, PxScale::from(TEXT_PX), font(), text);
}

/// `text` cut into lines no wider than `width` pixels: at spaces where it can,
/// inside a word only where one word alone is too wide. Nothing is dropped.
pub fn wrap(text: &str, width: u32) -> Vec<String> {
    let mut lines: Vec<String> = Vec::new();
    let mut line = String::new();
    for word in text.split(' ') {
        let candidate = if line.is_empty() {
            word.to_string()
        } else {
            format!("{line} {word}")
        };
        if text_width(&candidate) <= width || line.is_empty() && text_width(word) <= width {
            line = candidate;
            continue;
        }
        if !line.is_empty() {
            lines.push(std::mem::take(&mut line));
        }
        // The word alone: split it where it must.
        for ch in word.chars() {
            let mut next = line.clone();
            next.push(ch);
            if !line.is_empty() && text_width(&next) > width {
                lines.push(std::mem::take(&mut line));
                next = ch.to_string();
            }
            line = next;
        }
    }
    if !line.is_empty() || lines.is_empty() {
        lines.push(line);
    }
    lines
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_printable_ascii_character_draws_its_own_glyph() {
        let mut seen = std::collections::HashSet::new();
        for c in ' '..='~' {
            let mut img = RgbImage::new(16, LINE);
            draw_text(&mut img, 2, 0, &c.to_string(), Rgb([255, 255, 255]));
            let ink: Vec<u8> = img.pixels().map(|p| p.0[0]).collect();
            assert_eq!(c == ' ', ink.iter().all(|v| *v == 0), "{c:?}");
            assert!(seen.insert(ink), "{c:?} draws like another character");
        }
    }

    #[test]
    fn wrapping_keeps_every_character() {
        let text = "sobel-x@r: a long kernel name that does not fit";
        let lines = wrap(text, 90);
        assert!(lines.len() > 1);
        assert!(lines.iter().all(|l| text_width(l) <= 90), "{lines:?}");
        assert_eq!(lines.join(" "), text);
        let word = "abcdefghijklmnopqrstuvwxyz";
        assert_eq!(wrap(word, 40).concat(), word);
    }
}
