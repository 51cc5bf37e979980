//! Any bytes through the weight readers (.npy, .npz, safetensors) and the import
//! into a bank: errors are fine, panics and runaway allocation are not.
#![no_main]

use std::path::Path;

use libfuzzer_sys::fuzz_target;
use tapmap::kernel::import::{kernels_from, Layout};
use tapmap::kernel::tensors::{list_tensors_in, read_tensor_in};

fuzz_target!(|data: &[u8]| {
    let path = Path::new("fuzz.bin");
    if let Ok(infos) = list_tensors_in(data, path) {
        for info in infos.iter().take(4) {
            if let Ok(t) = read_tensor_in(data, path, Some(&info.name)) {
                let _ = kernels_from(&t, Layout::Oihw, path);
                let _ = kernels_from(&t, Layout::Hwio, path);
            }
        }
    }
    let _ = read_tensor_in(data, path, None);
});
