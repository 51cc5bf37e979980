//! Any text through the recipe parser, then planning it over a small input.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    if let Ok(text) = std::str::from_utf8(data) {
        if let Ok(spec) = tapmap::stage::recipefile::parse_recipe(text, std::path::Path::new("fuzz.toml")) {
            let _ = tapmap::pipeline::Plan::new(&spec.recipe, (1, 17, 23), tapmap::engine::Engine::Auto);
        }
    }
});
