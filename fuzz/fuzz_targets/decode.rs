//! Fuzz target: the command-line tool's decode path (`cli/src/decode.rs`, compiled here as it
//! is: the `weft` crate has no library target) on any file.
//!
//! Byte 0 picks the file name extension Symphonia gets as a hint (formats without a signature,
//! raw MP3 and ADTS AAC, are found through it); the rest is the file. Opening and decoding must
//! return blocks or an error, never panic, hang or hold memory beyond one packet.

#![no_main]

#[allow(dead_code)]
#[path = "../../cli/src/decode.rs"]
mod decode;

use libfuzzer_sys::fuzz_target;
use std::path::PathBuf;
use std::sync::OnceLock;

/// Hints byte 0 chooses from (`""`: none, the probe goes by content alone).
const EXTENSIONS: [&str; 12] = [
    "", "wav", "flac", "mp3", "ogg", "m4a", "aac", "mkv", "caf", "aiff", "webm", "mp4",
];
/// Frames per channel decoded from one input at most (a hang guard; ~35 min at 8 kHz).
const MAX_FRAMES: u64 = 1 << 24;

/// A folder of this process's own (on tmpfs when there is one: one file write per input).
fn scratch_dir() -> &'static PathBuf {
    static DIR: OnceLock<PathBuf> = OnceLock::new();
    DIR.get_or_init(|| {
        let shm = PathBuf::from("/dev/shm");
        let base = if shm.is_dir() {
            shm
        } else {
            std::env::temp_dir()
        };
        let dir = base.join(format!("weft-fuzz-decode-{}", std::process::id()));
        if let Err(err) = std::fs::create_dir_all(&dir) {
            panic!("cannot create {}: {err}", dir.display());
        }
        dir
    })
}

fuzz_target!(|data: &[u8]| {
    let Some((&pick, file)) = data.split_first() else {
        return;
    };
    let ext = EXTENSIONS[usize::from(pick) % EXTENSIONS.len()];
    let mut path = scratch_dir().join("input");
    if !ext.is_empty() {
        path.set_extension(ext);
    }
    if let Err(err) = std::fs::write(&path, file) {
        panic!("cannot write {}: {err}", path.display());
    }
    if let Ok(mut source) = decode::Source::open(&path) {
        let mut frames = 0_u64;
        while let Ok(Some((mid, side))) = source.next_block() {
            assert_eq!(mid.len(), side.len(), "mid and side differ in length");
            assert!(!mid.is_empty(), "an empty block");
            // `cli/src/decode.rs` refuses non-finite samples and halves before adding, so mid
            // and side stay finite even for samples near ±f32::MAX (the overflow this target
            // once found: tests/corpus/decode/overflowing-float-wav-mid).
            assert!(
                mid.iter().chain(side).all(|v| v.is_finite()),
                "a non-finite sample passed the decoder's check"
            );
            frames += mid.len() as u64;
            if frames > MAX_FRAMES {
                break;
            }
        }
    }
    let _ = std::fs::remove_file(&path);
});
