//! Weft's standalone program: the plugin on an audio input (JACK, ALSA or a dummy backend).
//! `weft-standalone --help` lists the audio options.

fn main() {
    nice_plug::prelude::nice_export_standalone::<weft_plugin::Weft>();
}
