//! Inputs that once made a reader panic (found by the fuzz targets in `fuzz/`),
//! kept forever: each must now give an error or a value, never a panic.

use std::path::Path;

#[test]
fn every_regression_input_is_handled() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/regression");
    let mut n = 0;
    for e in std::fs::read_dir(&dir).unwrap() {
        let p = e.unwrap().path();
        let bytes = std::fs::read(&p).unwrap();
        let name = p.file_name().unwrap().to_string_lossy().into_owned();
        if name.starts_with("weights-") {
            let _ = tapmap::kernel::tensors::read_tensor_in(&bytes, &p, None);
            let _ = tapmap::kernel::tensors::list_tensors_in(&bytes, &p);
        } else if name.starts_with("bank-") {
            let _ = tapmap::kernel::bankfile::parse_bank(&String::from_utf8_lossy(&bytes), &p);
        } else if name.starts_with("recipe-") {
            let _ = tapmap::stage::recipefile::parse_recipe(&String::from_utf8_lossy(&bytes), &p);
        } else if name.starts_with("image-") {
            let _ = tapmap::image_io::decode_image(&bytes, &p, &Default::default());
        } else {
            continue;
        }
        n += 1;
    }
    assert!(n >= 1, "regression inputs are present");
    // The first one: a .npy dtype descriptor starting with a multi-byte character,
    // in a header that is not whole: refused as such.
    let bytes = std::fs::read(dir.join("weights-npy-descr-multibyte.bin")).unwrap();
    let e = tapmap::kernel::tensors::read_tensor_in(&bytes, Path::new("x.npy"), None).unwrap_err();
    assert!(
        e.to_string()
            .contains("x.npy: has a header that does not parse"),
        "{e}"
    );
}
