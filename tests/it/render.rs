//! The diverging colour scale, colour conversions, views and sheets.

use tapmap::render::colormap::{diverging, lab_to_srgb, srgb_to_lab, table, NEGATIVE, POSITIVE};
use tapmap::render::sheet::{draw_text, sheet};
use tapmap::render::view::{mapping, render, Scale, ViewImage};

#[test]
fn cielab_of_srgb_white_and_red() {
    // D65 white is L* = 100, a* = b* = 0 (CIE 15:2004).
    let w = srgb_to_lab([1.0, 1.0, 1.0]);
    assert!(
        (w[0] - 100.0).abs() < 0.01 && w[1].abs() < 0.01 && w[2].abs() < 0.01,
        "{w:?}"
    );
    // sRGB red: L* 53.24, a* 80.09, b* 67.20 (widely tabulated; from memory).
    let r = srgb_to_lab([1.0, 0.0, 0.0]);
    assert!(
        (r[0] - 53.24).abs() < 0.05 && (r[1] - 80.09).abs() < 0.1 && (r[2] - 67.20).abs() < 0.1,
        "{r:?}"
    );
    // Round trip.
    for c in [[0.2, 0.5, 0.7], [0.9, 0.1, 0.3], [0.0, 0.0, 0.0]] {
        let back = lab_to_srgb(srgb_to_lab(c));
        for i in 0..3 {
            assert!((back[i] - c[i]).abs() < 1e-6, "{c:?} -> {back:?}");
        }
    }
}

#[test]
fn diverging_scale_has_its_endpoints_a_light_centre_and_monotone_lightness() {
    let t = table();
    assert_eq!(t.len(), 256);
    let near = |a: [u8; 3], b: [u8; 3]| {
        a.iter()
            .zip(b)
            .all(|(x, y)| (*x as i32 - y as i32).abs() <= 1)
    };
    assert!(
        near(t[0], NEGATIVE) && near(t[255], POSITIVE),
        "{:?} {:?}",
        t[0],
        t[255]
    );
    let l = |c: [u8; 3]| srgb_to_lab(c.map(|v| v as f64 / 255.0))[0];
    // Moreland 2009: lightness rises to the (unsaturated) middle and falls after it.
    for i in 1..128 {
        assert!(l(t[i]) >= l(t[i - 1]) - 0.3, "rising at {i}");
    }
    for i in 129..256 {
        assert!(l(t[i]) <= l(t[i - 1]) + 0.3, "falling at {i}");
    }
    let mid = srgb_to_lab(diverging(
        NEGATIVE.map(|v| v as f64 / 255.0),
        POSITIVE.map(|v| v as f64 / 255.0),
        0.5,
    ));
    assert!(
        mid[0] > 85.0 && mid[1].abs() < 2.0 && mid[2].abs() < 2.0,
        "centre is near white: {mid:?}"
    );
    // The two ends have similar lightness, so neither sign looks stronger.
    assert!((l(t[0]) - l(t[255])).abs() < 6.0);
}

#[test]
fn views_map_values_to_levels_as_recorded() {
    let v = [0.0f32, 0.25, 0.5, 1.0];
    let m = mapping(&v, false, None, false);
    assert_eq!(
        (m.scale, m.lo, m.hi, m.levels),
        (Scale::Grey, 0.0, 1.0, 255)
    );
    let ViewImage::Grey8(g) = render(&v, 1, 4, &m) else {
        panic!("grey")
    };
    assert_eq!(g.as_raw(), &vec![0, 64, 128, 255]);
    let s = [-2.0f32, 0.0, 1.0, 2.0];
    let m = mapping(&s, true, None, false);
    assert_eq!((m.scale, m.lo, m.hi), (Scale::Diverging, -2.0, 2.0));
    let tab = table();
    let pic = render(&s, 1, 4, &m);
    let ViewImage::Indexed(i) = &pic else {
        panic!("indices into the diverging table")
    };
    assert_eq!(i.as_raw(), &vec![0, 128, 191, 255], "zero at the centre");
    let c = pic.to_rgb8(&tab);
    assert_eq!(c.get_pixel(0, 0).0, tab[0]);
    assert_eq!(c.get_pixel(3, 0).0, tab[255]);
    assert_eq!(c.get_pixel(1, 0).0, tab[128]);
    // Written as an indexed PNG whose palette is the table: any decoder shows
    // exactly the table's colours.
    let t = tempfile::TempDir::new().unwrap();
    let path = t.path().join("v.png");
    tapmap::render::write_view(&path, &pic, &tab, Default::default()).unwrap();
    let back = image::open(&path).unwrap().to_rgb8();
    assert_eq!(back, c);
    let m16 = mapping(&v, false, Some((0.0, 2.0)), true);
    let ViewImage::Grey16(g) = render(&v, 1, 4, &m16) else {
        panic!("grey16")
    };
    assert_eq!(g.as_raw(), &vec![0, 8192, 16384, 32768]);
}

#[test]
fn sheets_carry_whole_labels_in_the_bundled_font() {
    let cell = image::RgbImage::from_pixel(20, 10, image::Rgb([0, 0, 0]));
    let s = sheet(
        "title",
        &[
            ("alpha".into(), cell.clone()),
            ("beta".into(), cell.clone()),
        ],
    );
    assert!(s.width() >= 192 && s.height() > 96);
    let inked = |img: &image::RgbImage| img.pixels().filter(|p| p.0[0] > 150).count();
    assert!(inked(&s) > 40, "labels drawn: {} ink pixels", inked(&s));
    // A label wider than its cell wraps onto more lines: the sheet grows, and
    // no text is cut off (the old sheets ended such labels with '~').
    let long = "sobel-x@r [-0.125, 0.125] a name much wider than one cell of the sheet";
    let l = sheet(
        "title",
        &[(long.into(), cell.clone()), ("beta".into(), cell)],
    );
    assert!(
        l.height() >= s.height() + 2 * tapmap::render::text::LINE,
        "{} vs {}",
        l.height(),
        s.height()
    );
    assert!(inked(&l) > inked(&s));
    // '|' is its own glyph (the old 8×8 font drew it as '!').
    let draw = |t: &str| {
        let mut img = image::RgbImage::new(12, tapmap::render::text::LINE);
        draw_text(&mut img, 0, 0, t, image::Rgb([255, 255, 255]));
        img
    };
    assert_ne!(draw("|"), draw("!"));
}

#[test]
fn csv_columns_match_the_shipped_schemas() {
    use tapmap::jobs::borders::{BANDS_COLUMNS, BORDERS_COLUMNS, SUMMARY_COLUMNS};
    use tapmap::jobs::probe::PROBE_COLUMNS;
    use tapmap::jobs::tables::{IMAGES_COLUMNS, STATS_COLUMNS};
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("shared/schemas");
    for (file, cols) in [
        ("stats.csv.json", &STATS_COLUMNS[..]),
        ("images.csv.json", &IMAGES_COLUMNS[..]),
        ("probe.csv.json", &PROBE_COLUMNS[..]),
        ("borders.csv.json", &BORDERS_COLUMNS[..]),
        ("bands.csv.json", &BANDS_COLUMNS[..]),
        ("summary.csv.json", &SUMMARY_COLUMNS[..]),
    ] {
        let v: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(dir.join(file)).unwrap()).unwrap();
        let names: Vec<&str> = v["columns"]
            .as_array()
            .unwrap()
            .iter()
            .map(|c| c["name"].as_str().unwrap())
            .collect();
        assert_eq!(names, cols, "{file}");
    }
}

#[test]
fn keyed_views_and_sheets_carry_the_scale_with_its_values() {
    let t = tempfile::TempDir::new().unwrap();
    let img = image::ImageBuffer::from_fn(40, 30, |x, _| image::Luma([(x * 6) as u8]));
    let p = t.path().join("ramp.png");
    img.save(&p).unwrap();
    let out = t.path().join("o");
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_tapmap"))
        .args([
            "apply",
            "--bank",
            "sobel-x+box:size=3",
            "--save",
            "keys,sheets",
            "-q",
            "-o",
        ])
        .arg(&out)
        .arg(&p)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let tab = tapmap::render::colormap::table();
    // A signed map: the diverging key runs from the table's first colour to its
    // last; find its bar by its first pixel.
    let key = image::open(out.join("keys/ramp/00-sobel-x.png"))
        .unwrap()
        .to_rgb8();
    let bar = (0..key.height())
        .find(|&y| key.get_pixel(8, y).0 == tab[0])
        .expect("a bar starting with the scale's first colour");
    let right = (8..key.width())
        .rev()
        .find(|&x| key.get_pixel(x, bar).0 == tab[255]);
    assert!(
        right.is_some_and(|r| r > 60),
        "the bar ends with the last colour"
    );
    let mid = (8 + right.unwrap()) / 2;
    let c = key.get_pixel(mid, bar).0;
    assert!(
        c.iter().all(|v| (200..=235).contains(v)),
        "centre {c:?} is the scale's light grey"
    );
    // Its numbers and unit are drawn under the bar: ink there.
    let ink = (bar + 12..(bar + 12 + 2 * tapmap::render::text::LINE).min(key.height()))
        .flat_map(|y| (8..right.unwrap()).map(move |x| (x, y)))
        .filter(|&(x, y)| key.get_pixel(x, y).0[0] > 150)
        .count();
    assert!(ink > 60, "{ink} ink pixels under the key");
    // A non-negative map's key is grey, black to white.
    let g = image::open(out.join("keys/ramp/01-box_size=3.png"))
        .unwrap()
        .to_rgb8();
    let bar = (0..g.height())
        .find(|&y| {
            let next = g.get_pixel(9, y).0;
            g.get_pixel(8, y).0 == [0, 0, 0] && next[0] > 0 && next[0] < 5 && next[0] == next[2]
        })
        .expect("a grey bar from black");
    assert!((8..g.width()).any(|x| g.get_pixel(x, bar).0 == [255, 255, 255]));
    // The sheet carries the same keys.
    let sheet = image::open(out.join("sheets/ramp.png")).unwrap().to_rgb8();
    assert!(sheet.pixels().any(|p| p.0 == tab[0]) && sheet.pixels().any(|p| p.0 == tab[255]));
}

#[test]
fn probe_patches_show_their_field_framed_in_context() {
    let t = tempfile::TempDir::new().unwrap();
    let img = image::ImageBuffer::from_fn(48, 40, |x, y| {
        image::Luma([if (x / 6 + y / 6) % 2 == 0 { 200u8 } else { 40 }])
    });
    let p = t.path().join("checks.png");
    img.save(&p).unwrap();
    let out = t.path().join("o");
    let o = std::process::Command::new(env!("CARGO_BIN_EXE_tapmap"))
        .args(["probe", "--bank", "sobel-x", "--top", "3", "-q", "-o"])
        .arg(&out)
        .arg(&p)
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let sheet = image::open(out.join("kernels/00-sobel-x.png"))
        .unwrap()
        .to_rgb8();
    let frame = tapmap::jobs::probe::FRAME;
    let framed = sheet.pixels().filter(|p| p.0 == frame).count();
    // Three hits, each a 2-pixel frame around a 3×3 field enlarged to a cell.
    assert!(framed > 3 * 4 * 2 * 40, "{framed} frame pixels");
    // Each patch has its key: the input's grey scale from black (0) to white (1).
    let bar = (0..sheet.height()).any(|y| {
        sheet.get_pixel(8, y).0 == [0, 0, 0] && {
            let p = sheet.get_pixel(8 + 150, y).0;
            p[0] > 150 && p[0] == p[2]
        }
    });
    assert!(bar, "a grey key under the patches");
    // The frame encloses input pixels of the patch, not only background.
    let patch = tapmap::jobs::probe::patch_in_context(
        &tapmap::image_io::read_image(&p, &Default::default()).unwrap(),
        (10, 10, 3, 3),
    );
    // Margin 2 on each side of a 3-sample field: 7 samples, enlarged ×27.
    assert_eq!(patch.dimensions(), (7 * 27, 7 * 27));
    assert_eq!(
        patch.get_pixel(2 * 27 - 1, 3 * 27).0,
        frame,
        "left side of the frame"
    );
    assert_ne!(
        patch.get_pixel(3 * 27, 3 * 27).0,
        frame,
        "inside the field: the input"
    );
}

#[test]
fn bank_pictures_grid_their_taps_and_can_write_the_values() {
    let bank = tapmap::kernel::builtin::resolve_bank("sobel-x").unwrap();
    let tab = tapmap::render::colormap::table();
    let plain = tapmap::render::taps::taps_cell(&bank.kernels[0], &tab, false);
    let valued = tapmap::render::taps::taps_cell(&bank.kernels[0], &tab, true);
    // 3×3 taps at 64 px each with a grid line between them: 3·64 + 1.
    assert_eq!(plain.dimensions(), (193, 193));
    let grid = [30, 33, 36];
    assert!(
        (0..193).all(|y| plain.get_pixel(64, y).0 == grid),
        "a grid column between taps"
    );
    // The middle of a tap square holds the tap's colour: sobel-x's top-left is -1
    // of a ±2 scale (Szeliski 2010, §3.2.1).
    assert_eq!(
        plain.get_pixel(10, 10).0,
        tab[(127.5 - 127.5 / 2.0_f64).round() as usize]
    );
    // With values, text sits in the squares: the pictures differ only there.
    let differ = plain
        .pixels()
        .zip(valued.pixels())
        .filter(|(a, b)| a != b)
        .count();
    assert!(differ > 9 * 10, "{differ} pixels of text");
    assert_eq!(
        plain.get_pixel(64, 100),
        valued.get_pixel(64, 100),
        "the grid stays"
    );
}
