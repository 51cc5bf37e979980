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
    info.captured = text(exif::Tag::DateTimeOriginal).or_else(|| text(exif::Tag::DateTime));
    info.exposure = field(exif::Tag::ExposureTime).and_then(|f| match &f.value {
        exif::Value::Rational(v) => v.first().map(|r| format!("{}/{}", r.num, r.denom)),
        _ => None,
    });
    Ok(())
}
