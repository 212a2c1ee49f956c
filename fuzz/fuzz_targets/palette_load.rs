//! Fuzz target: the palette loader, `weft_engine::palette::Palette::from_bytes`, on any bytes,
//! with the rules of `weft_fuzz::check_palette_input`.

#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    weft_fuzz::check_palette_input(data);
});
