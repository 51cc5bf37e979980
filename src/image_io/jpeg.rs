//! Whether a JPEG file is whole: it must run to its end-of-image marker.

/// Checks that JPEG bytes run to their end-of-image marker: the JPEG decoder
/// fills a stream that stops early with grey and reports nothing, so a capture
/// cut short in transfer would otherwise give maps of made-up pixels. Walks the
/// marker segments and entropy-coded data as ITU-T T.81 §B.1 lays them out
/// (written here: no crate offers a check without a full decode). `data` is
/// the whole file, which starts with the SOI marker (checked by the format
/// sniffing).
pub(crate) fn jpeg_ends_whole(data: &[u8]) -> Result<(), String> {
    let cut = || "is truncated: the JPEG data stops before its end-of-image marker".to_string();
    let mut i = 2; // SOI was checked by the format sniffing.
    let mut in_scan = false;
    loop {
        if in_scan {
            // Entropy-coded data: skip to the next 0xFF.
            i += data
                .get(i..)
                .and_then(|d| d.iter().position(|&b| b == 0xFF))
                .ok_or_else(cut)?;
        }
        if *data.get(i).ok_or_else(cut)? != 0xFF {
            return Err("is damaged: a JPEG marker is missing where one must be".into());
        }
        // Fill bytes (0xFF) may precede a marker.
        while data.get(i) == Some(&0xFF) {
            i += 1;
        }
        let m = *data.get(i).ok_or_else(cut)?;
        i += 1;
        match m {
            0x00 | 0xD0..=0xD7 if in_scan => {} // stuffed byte, restart marker
            0xD9 => return Ok(()),
            0x01 | 0xD0..=0xD7 => {}
            _ => {
                let len = data.get(i..i + 2).ok_or_else(cut)?;
                let len = u16::from_be_bytes([len[0], len[1]]) as usize;
                i += len;
                if i > data.len() {
                    return Err(cut());
                }
                in_scan = m == 0xDA;
            }
        }
    }
}
