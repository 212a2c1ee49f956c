//! Fuzz target: the style model loader, `weft_engine::style::StyleModel::from_json`
//! (`engine/src/style/model_file.rs`), on any text, with the rules of
//! `weft_fuzz::check_style_model_input`.

#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    weft_fuzz::check_style_model_input(data);
});
