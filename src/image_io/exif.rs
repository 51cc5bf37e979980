//! EXIF metadata: orientation (tag 0x0112), capture time and exposure, read
//! with kamadak-exif from the raw block the decoder hands over (EXIF 2.3, JEITA
//! CP-3451C).

use crate::image_io::loaded::ImageMeta;

/// Fills orientation, capture time and exposure from a raw EXIF block
/// (TIFF structure, with or without the `Exif\0\0` prefix).
pub(crate) fn read_exif(raw: &[u8], info: &mut ImageMeta) -> Result<(), String> {
    let body = raw.strip_prefix(b"Exif\0\0").unwrap_or(raw);
    let exif = exif::Reader::new().read_raw(body.to_vec()).map_err(|e| {
        format!("has an EXIF block that does not parse ({e}); use --ignore-orientation to skip it")
    })?;
    let field = |tag| exif.get_field(tag, exif::In::PRIMARY);
    if let Some(f) = field(exif::Tag::Orientation) {
        info.orientation = Some(
            f.value
                .get_uint(0)
                .map_or(0, |v| v.min(u16::MAX as u32) as u16),
        );
    }
    let text = |tag| {
        field(tag).map(|f| match &f.value {
            exif::Value::Ascii(v) => v
                .first()
                .map(|s| String::from_utf8_lossy(s).trim().to_string())
                .unwrap_or_default(),
            other => other.display_as(tag).to_string(),
        })
    };
    let (when, offset) = match text(exif::Tag::DateTimeOriginal) {
        Some(t) => (Some(t), text(exif::Tag::OffsetTimeOriginal)),
        None => (text(exif::Tag::DateTime), text(exif::Tag::OffsetTime)),
    };
    info.captured = when.map(|t| iso_8601(&t, offset.as_deref()));
    info.exposure = field(exif::Tag::ExposureTime).and_then(|f| match &f.value {
        exif::Value::Rational(v) => v
            .first()
            .filter(|r| r.denom != 0)
            .map(|r| f64::from(r.num) / f64::from(r.denom)),
        _ => None,
    });
    Ok(())
}

/// An EXIF date and time, `YYYY:MM:DD HH:MM:SS` (EXIF 2.32, JEITA CP-3451E,
/// §4.6.5 DateTimeOriginal; section from memory), in ISO 8601 extended form, `YYYY-MM-DDTHH:MM:SS`,
/// with the offset `±HH:MM` of OffsetTimeOriginal when given (local time
/// without one). Text of another shape, or with digits out of range, is kept
/// as written.
fn iso_8601(exif: &str, offset: Option<&str>) -> String {
    let b = exif.as_bytes();
    let digits = |r: std::ops::Range<usize>| {
        b.get(r.clone())
            .filter(|d| d.iter().all(u8::is_ascii_digit))
            .map(|d| d.iter().fold(0u32, |a, c| a * 10 + u32::from(c - b'0')))
    };
    let shaped = b.len() == 19
        && b[4] == b':'
        && b[7] == b':'
        && b[10] == b' '
        && b[13] == b':'
        && b[16] == b':';
    let fields = (
        digits(0..4),
        digits(5..7),
        digits(8..10),
        digits(11..13),
        digits(14..16),
        digits(17..19),
    );
    let (Some(y), Some(mo), Some(d), Some(h), Some(mi), Some(s)) = fields else {
        return exif.to_string();
    };
    if !shaped || !(1..=12).contains(&mo) || !(1..=31).contains(&d) || h > 23 || mi > 59 || s > 60 {
        return exif.to_string();
    }
    let mut out = format!("{y:04}-{mo:02}-{d:02}T{h:02}:{mi:02}:{s:02}");
    if let Some(o) = offset {
        let o = o.trim();
        let ok = o.len() == 6
            && matches!(o.as_bytes()[0], b'+' | b'-')
            && o.as_bytes()[3] == b':'
            && o[1..3]
                .bytes()
                .chain(o[4..6].bytes())
                .all(|c| c.is_ascii_digit());
        if ok {
            out.push_str(o);
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::iso_8601;

    #[test]
    fn exif_times_become_iso_8601() {
        // EXIF's own layout (EXIF 2.32 §4.6.5) and ISO 8601-1:2019 §5.4.2 extended
        // form (section numbers from memory).
        assert_eq!(iso_8601("2026:11:30 22:14:05", None), "2026-11-30T22:14:05");
        assert_eq!(
            iso_8601("2026:11:30 22:14:05", Some("+09:00")),
            "2026-11-30T22:14:05+09:00"
        );
        assert_eq!(
            iso_8601("2026:11:30 22:14:05", Some("junk")),
            "2026-11-30T22:14:05"
        );
        // Unknown dates are written with spaces or colons only (EXIF): kept.
        assert_eq!(iso_8601("    :  :     :  :  ", None), "    :  :     :  :  ");
        assert_eq!(iso_8601("2026:13:30 22:14:05", None), "2026:13:30 22:14:05");
    }
}
