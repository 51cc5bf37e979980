//! Limits on what one image may take, checked before the work that would
//! exceed them: pixels from the file's header before decoding, memory from the
//! decoder's and the plan's own size arithmetic before allocating.

use crate::error::Error;

/// Default `--max-pixels`: 2^28 = 16384 × 16384.
pub const DEFAULT_MAX_PIXELS: u64 = 1 << 28;
/// Default `--max-memory` per image: 4 GiB.
pub const DEFAULT_MAX_MEMORY: u64 = 4 << 30;

/// How large one image may be.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Limits {
    /// Refuse images with more pixels than this, before decoding them.
    pub max_pixels: u64,
    /// Bytes one image may take to read, decode and run through the recipe.
    pub max_memory: u64,
}

impl Default for Limits {
    fn default() -> Self {
        Limits {
            max_pixels: DEFAULT_MAX_PIXELS,
            max_memory: DEFAULT_MAX_MEMORY,
        }
    }
}

impl Limits {
    /// Checks an image's size against `max_pixels`.
    pub fn check_pixels(&self, w: u64, h: u64) -> Result<(), Error> {
        let px = w.saturating_mul(h);
        if px > self.max_pixels {
            return Err(Error::limit(format!(
                "is {w}×{h} = {} pixels, over the limit of {} pixels (--max-pixels)",
                grouped(px),
                grouped(self.max_pixels)
            )));
        }
        Ok(())
    }

    /// Checks that `need` bytes, for `what` ("to decode", "to run the recipe
    /// on its 640×480 pixels"), fit in `max_memory`.
    pub fn check_memory(&self, need: u64, what: &str) -> Result<(), Error> {
        if need > self.max_memory {
            return Err(Error::limit(format!(
                "needs about {} {what}, over --max-memory ({})",
                bytes_text(need),
                bytes_text(self.max_memory)
            )));
        }
        Ok(())
    }
}

/// A byte count as people write one: a whole number with an optional unit K, M,
/// G or T (powers of 1024; `KiB`, `KB` and `K` alike), e.g. `512M`, `8G`.
pub fn parse_bytes(s: &str) -> Result<u64, String> {
    let t = s.trim();
    let split = t.find(|c: char| !c.is_ascii_digit()).unwrap_or(t.len());
    let (num, unit) = t.split_at(split);
    let n: u64 = num
        .parse()
        .map_err(|_| format!("'{s}' is not a size such as 512M or 8G"))?;
    let shift = match unit.trim().to_ascii_uppercase().as_str() {
        "" | "B" => 0,
        "K" | "KB" | "KIB" => 10,
        "M" | "MB" | "MIB" => 20,
        "G" | "GB" | "GIB" => 30,
        "T" | "TB" | "TIB" => 40,
        _ => {
            return Err(format!(
                "'{s}': unknown unit; use K, M, G or T (powers of 1024)"
            ))
        }
    };
    n.checked_mul(1u64 << shift)
        .filter(|v| *v > 0)
        .ok_or_else(|| format!("'{s}' is out of range"))
}

/// A byte count for messages: `512 B`, `3.4 KiB`, `12.0 MiB`, `4.0 GiB`.
pub fn bytes_text(n: u64) -> String {
    const UNITS: [&str; 4] = ["KiB", "MiB", "GiB", "TiB"];
    if n < 1024 {
        return format!("{n} B");
    }
    let mut v = n as f64 / 1024.0;
    let mut u = 0;
    while v >= 1024.0 && u < UNITS.len() - 1 {
        v /= 1024.0;
        u += 1;
    }
    format!("{v:.1} {}", UNITS[u])
}

/// A whole number with its digits in groups of three, separated by commas
/// (`268,435,456`): the one style tapmap uses for counts meant for people.
pub fn grouped(n: impl Into<u128>) -> String {
    let s = n.into().to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn counts_and_sizes_read_well() {
        assert_eq!(grouped(0u64), "0");
        assert_eq!(grouped(999u64), "999");
        assert_eq!(grouped(1000u64), "1,000");
        assert_eq!(grouped(393_288_012u64), "393,288,012");
        assert_eq!(bytes_text(512), "512 B");
        assert_eq!(bytes_text(4 << 30), "4.0 GiB");
        let l = Limits {
            max_pixels: 100,
            max_memory: 1 << 20,
        };
        assert!(l.check_pixels(10, 10).is_ok());
        assert!(l
            .check_pixels(10, 11)
            .unwrap_err()
            .to_string()
            .contains("110 pixels"));
        assert!(l.check_memory(2 << 20, "to decode").is_err());
    }
}
