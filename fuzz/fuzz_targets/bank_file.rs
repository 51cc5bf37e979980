//! Any text through the bank-file parser.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Ok(bank) = tapmap::kernel::bankfile::parse_bank(text, std::path::Path::new("fuzz.toml")) {
            let _ = tapmap::kernel::bankfile::bank_to_toml(&bank);
        }
    }
});
