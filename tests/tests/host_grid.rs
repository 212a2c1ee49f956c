//! The built plugin in a real CLAP host (see `weft_tests`), over a grid of sample rates × block
//! sizes × channel layouts:
//!
//! - audio passes through bit for bit, NaN payloads, infinities, subnormals and −0.0 included;
//! - a sine's level reads its closed form, and in offline rendering every sample is analysed;
//! - in realtime mode a flooded ring drops, and analysed + dropped = processed, exactly;
//! - state round-trips, reaches the analysis, and garbage state is refused without harm.
//!
//! Needs the bundle: run `cargo xtask bundle weft` first (the tests fail, never skip, without it).

use rand::rngs::SmallRng;
use rand::{Rng, RngCore, SeedableRng};
use std::fmt;
use std::time::Instant;
use weft_tests::{Settings, Snapshot, WeftPlugin, describe, state_format};

/// Block sizes of the grid, frames (1 and a prime-ish 333 catch framing bugs; 16384 is the
/// largest block common hosts use).
const BLOCK_SIZES: [u32; 6] = [1, 64, 333, 512, 4096, 16_384];
/// Channel layouts the plugin offers (stereo and mono in/out).
const CHANNELS: [u32; 2] = [1, 2];
/// Seed of every random generator here; printed in failure messages.
const SEED: u64 = 0x5EED_7E57_0001;
/// Audio per pass-through cell, at least (and at least four blocks), frames.
const PASS_THROUGH_MIN_FRAMES: usize = 20_000;
/// Audio per level cell, seconds.
const LEVEL_DURATION_S: f64 = 1.5;
/// Frequency and peak amplitude of the level test's sine (−20 dBFS peak).
const SINE_HZ: f64 = 1000.0;
const SINE_AMPLITUDE: f64 = 0.1;
/// Tolerance of the level readings against the closed form, dB.
const LEVEL_TOLERANCE_DB: f64 = 0.05;
/// Tolerance of the smoothed level against its recomputation, dB: both sides do the same f64
/// arithmetic on the same f32 samples, so only the f32 rounding of dB values differs. Small
/// enough to tell a 20 ms response from a 1 ms one after a steady sine (≈ 0.01 dB apart).
const SMOOTHING_TOLERANCE_DB: f64 = 1e-3;

/// Sample values a careless copy or conversion would change.
const SPECIALS: [f32; 16] = [
    f32::from_bits(0x7fc0_1234), // quiet NaN with a payload
    f32::from_bits(0xffc0_4321), // negative quiet NaN with a payload
    f32::from_bits(0x7f80_0001), // signalling NaN (quieted by any x87 round trip)
    f32::INFINITY,
    f32::NEG_INFINITY,
    f32::from_bits(1), // smallest subnormal
    f32::MIN_POSITIVE / 2.0,
    -f32::MIN_POSITIVE / 3.0,
    -0.0,
    0.0,
    f32::MAX,
    f32::MIN,
    f32::MIN_POSITIVE,
    f32::EPSILON,
    1.0,
    -1.0,
];

/// One cell of the grid.
#[derive(Debug, Clone, Copy)]
struct Cell {
    rate_hz: u32,
    block: u32,
    channels: u32,
}

impl Cell {
    fn settings(self, offline: bool) -> Settings {
        Settings {
            sample_rate_hz: f64::from(self.rate_hz),
            max_block: self.block,
            channels: self.channels,
            offline,
        }
    }
}

impl fmt::Display for Cell {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} Hz, block {}, {} ch",
            self.rate_hz, self.block, self.channels
        )
    }
}

fn cells(rate_hz: u32) -> impl Iterator<Item = Cell> {
    BLOCK_SIZES.into_iter().flat_map(move |block| {
        CHANNELS.into_iter().map(move |channels| Cell {
            rate_hz,
            block,
            channels,
        })
    })
}

fn new_plugin() -> WeftPlugin {
    WeftPlugin::new().unwrap_or_else(|err| panic!("cannot create the plugin: {}", describe(&err)))
}

fn activate(plugin: &mut WeftPlugin, settings: Settings, what: &dyn fmt::Display) {
    plugin
        .activate(settings)
        .unwrap_or_else(|err| panic!("[{what}] activation failed: {}", describe(&err)));
}

fn deactivate(plugin: &mut WeftPlugin, what: &dyn fmt::Display) -> Snapshot {
    plugin
        .deactivate()
        .unwrap_or_else(|err| panic!("[{what}] deactivation failed: {}", describe(&err)))
}

/// Per-channel input and output buffers of one block size.
struct Buffers {
    inputs: Vec<Vec<f32>>,
    outputs: Vec<Vec<f32>>,
}

impl Buffers {
    fn new(channels: u32, block: u32) -> Self {
        let make = || vec![vec![0.0_f32; block as usize]; channels as usize];
        Self {
            inputs: make(),
            outputs: make(),
        }
    }

    /// Fills every output with the bitwise complement of the input at the same place, so that
    /// an untouched output can never pass for a copied one.
    fn fill_sentinel(&mut self, len: usize) {
        for (input, output) in self.inputs.iter().zip(&mut self.outputs) {
            for (x, y) in input[..len].iter().zip(&mut output[..len]) {
                *y = f32::from_bits(!x.to_bits());
            }
        }
    }

    /// Runs one out-of-place block of `len` frames.
    fn process(&mut self, plugin: &mut WeftPlugin, len: usize, what: &dyn fmt::Display) {
        let mut inputs: Vec<&mut [f32]> = self.inputs.iter_mut().map(|b| &mut b[..len]).collect();
        let mut outputs: Vec<&mut [f32]> = self.outputs.iter_mut().map(|b| &mut b[..len]).collect();
        plugin
            .process(&mut inputs, &mut outputs)
            .unwrap_or_else(|err| panic!("[{what}] process failed: {}", describe(&err)));
    }

    /// Asserts that the first `len` output frames equal the inputs bit for bit.
    fn assert_bit_exact(&self, len: usize, what: &dyn fmt::Display) {
        for (c, (input, output)) in self.inputs.iter().zip(&self.outputs).enumerate() {
            for (i, (x, y)) in input[..len].iter().zip(&output[..len]).enumerate() {
                assert_eq!(
                    x.to_bits(),
                    y.to_bits(),
                    "[{what}] channel {c}, frame {i} of the block: input {x:e} ({:#010x}) came out \
                     as {y:e} ({:#010x}) (seed {SEED:#x})",
                    x.to_bits(),
                    y.to_bits()
                );
            }
        }
    }
}

/// The pass-through test signal: random bit patterns (every float class occurs) with the
/// special values interleaved, different on each channel.
fn pass_through_value(rng: &mut SmallRng, channel: usize, frame: usize) -> f32 {
    let phase = (frame + 5 * channel) % 7;
    if phase == 0 {
        SPECIALS[(frame / 7 + 3 * channel) % SPECIALS.len()]
    } else {
        f32::from_bits(rng.next_u32())
    }
}

/// Snapshot fields must be numbers even when the input was not (NaN, ±Inf, `f32::MAX`).
fn assert_levels_finite(snapshot: &Snapshot, what: &dyn fmt::Display) {
    for (name, value) in [
        ("rms_db", snapshot.rms_db),
        ("peak_db", snapshot.peak_db),
        ("rms_smoothed_db", snapshot.rms_smoothed_db),
        ("peak_hold_db", snapshot.peak_hold_db),
    ] {
        assert!(
            value.is_finite(),
            "[{what}] {name} is {value}: {snapshot:?}"
        );
    }
    assert!(
        snapshot.level_history_db.iter().all(|v| v.is_finite()),
        "[{what}] level history has a non-number: {snapshot:?}"
    );
}

/// Checks one cell in realtime mode: bit-exact pass-through, inputs untouched, exact sample
/// accounting. Returns the frames processed.
fn pass_through_cell(cell: Cell, rng: &mut SmallRng) -> usize {
    let mut plugin = new_plugin();
    activate(&mut plugin, cell.settings(false), &cell);
    let block = cell.block as usize;
    let target = PASS_THROUGH_MIN_FRAMES.max(4 * block);
    let mut buffers = Buffers::new(cell.channels, cell.block);
    let mut done = 0;
    let mut call = 0_usize;
    while done < target {
        // Every fourth call is shorter than the maximum, as hosts do at loop points.
        let len = if call % 4 == 3 {
            rng.gen_range(1..=block)
        } else {
            block
        }
        .min(target - done);
        for (c, input) in buffers.inputs.iter_mut().enumerate() {
            for (i, x) in input[..len].iter_mut().enumerate() {
                *x = pass_through_value(rng, c, done + i);
            }
        }
        let before = buffers.inputs.clone();
        buffers.fill_sentinel(len);
        let what = format!("{cell}, call {call}, {len} frames");
        buffers.process(&mut plugin, len, &what);
        buffers.assert_bit_exact(len, &what);
        for (c, (now, was)) in buffers.inputs.iter().zip(&before).enumerate() {
            let changed = now[..len]
                .iter()
                .zip(&was[..len])
                .position(|(a, b)| a.to_bits() != b.to_bits());
            assert_eq!(
                changed, None,
                "[{what}] the plugin wrote into input channel {c}"
            );
        }
        done += len;
        call += 1;
    }
    let snapshot = deactivate(&mut plugin, &cell);
    assert!(!snapshot.offline, "[{cell}] realtime run reported offline");
    assert_eq!(snapshot.channels, cell.channels, "[{cell}] {snapshot:?}");
    assert_eq!(snapshot.sample_rate_hz, cell.rate_hz as f32, "[{cell}]");
    assert_eq!(
        snapshot.samples_analysed + snapshot.samples_dropped,
        done as u64,
        "[{cell}] analysed + dropped must equal the frames processed: {snapshot:?}"
    );
    assert_levels_finite(&snapshot, &cell);
    done
}

fn pass_through_grid(rate_hz: u32) {
    let start = Instant::now();
    let mut rng = SmallRng::seed_from_u64(SEED ^ u64::from(rate_hz));
    let mut ran = 0;
    let mut frames = 0;
    for cell in cells(rate_hz) {
        frames += pass_through_cell(cell, &mut rng);
        ran += 1;
    }
    assert_eq!(ran, BLOCK_SIZES.len() * CHANNELS.len());
    println!(
        "pass-through at {rate_hz} Hz: {ran} cells bit-exact, {frames} frames, {:.1} s",
        start.elapsed().as_secs_f64()
    );
}

/// Frame length of the analysis at a sample rate, samples (hop = a quarter): 2048 at 44.1 and
/// 48 kHz, 4096 at 96 kHz, 8192 at 192 kHz, per `FrameConfig::for_sample_rate` in
/// `engine/src/frames.rs`.
fn frame_len(rate_hz: u32) -> usize {
    match rate_hz {
        r if r >= 176_400 => 8192,
        r if r >= 88_200 => 4096,
        _ => 2048,
    }
}

/// Frames the analysis completes from `total` samples: frames are centred (librosa 0.11.0
/// `center=True`: `frame_len / 2` zeros precede the signal), so frame `k` completes when
/// `frame_len / 2 + k·hop` samples have arrived (`engine/src/frames.rs`).
fn expected_frames(total: usize, frame_len: usize) -> u64 {
    let half = frame_len / 2;
    if total < half {
        0
    } else {
        ((total - half) / (frame_len / 4) + 1) as u64
    }
}

/// The level test's sine, sample `n`.
fn sine(rate_hz: u32, n: usize) -> f32 {
    let t = n as f64 / f64::from(rate_hz);
    (SINE_AMPLITUDE * (2.0 * std::f64::consts::PI * SINE_HZ * t).sin()) as f32
}

/// Runs `total` frames of the sine through an active plugin in blocks of the cell's size (the
/// last one shorter), checking pass-through on the way.
fn run_sine(plugin: &mut WeftPlugin, cell: Cell, total: usize) {
    let block = cell.block as usize;
    let mut buffers = Buffers::new(cell.channels, cell.block);
    let mut done = 0;
    while done < total {
        let len = block.min(total - done);
        for input in &mut buffers.inputs {
            for (i, x) in input[..len].iter_mut().enumerate() {
                *x = sine(cell.rate_hz, done + i);
            }
        }
        buffers.fill_sentinel(len);
        let what = format!("{cell}, frame {done}");
        buffers.process(plugin, len, &what);
        buffers.assert_bit_exact(len, &what);
        done += len;
    }
}

/// RMS of a sine of peak amplitude A is A/√2 (closed form), so −20 dBFS peak reads
/// −23.0103 dBFS RMS.
fn sine_rms_db() -> f64 {
    20.0 * (SINE_AMPLITUDE / std::f64::consts::SQRT_2).log10()
}

fn level_cell(cell: Cell) -> usize {
    let total = (LEVEL_DURATION_S * f64::from(cell.rate_hz)).round() as usize;
    let mut plugin = new_plugin();
    activate(&mut plugin, cell.settings(true), &cell);
    run_sine(&mut plugin, cell, total);
    let s = deactivate(&mut plugin, &cell);
    let peak_db = 20.0 * SINE_AMPLITUDE.log10();
    assert!(s.offline, "[{cell}] offline run reported realtime: {s:?}");
    assert_eq!(s.channels, cell.channels, "[{cell}] {s:?}");
    assert_eq!(
        s.samples_dropped, 0,
        "[{cell}] offline must not drop: {s:?}"
    );
    assert_eq!(
        s.samples_analysed, total as u64,
        "[{cell}] offline must analyse every sample: {s:?}"
    );
    assert_eq!(
        s.frames,
        expected_frames(total, frame_len(cell.rate_hz)),
        "[{cell}] frame count: {s:?}"
    );
    assert!(
        (f64::from(s.peak_db) - peak_db).abs() <= LEVEL_TOLERANCE_DB,
        "[{cell}] peak {} dBFS, expected {peak_db} ± {LEVEL_TOLERANCE_DB}: {s:?}",
        s.peak_db
    );
    assert!(
        (f64::from(s.rms_db) - sine_rms_db()).abs() <= LEVEL_TOLERANCE_DB,
        "[{cell}] RMS {} dBFS, expected {:.4} ± {LEVEL_TOLERANCE_DB}: {s:?}",
        s.rms_db,
        sine_rms_db()
    );
    // The hold is the loudest frame peak: at least the newest, never above the true peak.
    assert!(
        s.peak_hold_db >= s.peak_db && f64::from(s.peak_hold_db) <= peak_db + 1e-3,
        "[{cell}] peak hold {}: {s:?}",
        s.peak_hold_db
    );
    total
}

fn level_grid(rate_hz: u32) {
    let start = Instant::now();
    let mut ran = 0;
    let mut frames = 0;
    for cell in cells(rate_hz) {
        frames += level_cell(cell);
        ran += 1;
    }
    assert_eq!(ran, BLOCK_SIZES.len() * CHANNELS.len());
    println!(
        "sine level, offline at {rate_hz} Hz: {ran} cells, {frames} frames, none dropped, {:.1} s",
        start.elapsed().as_secs_f64()
    );
}

#[test]
fn pass_through_is_bit_exact_at_44100_hz() {
    pass_through_grid(44_100);
}

#[test]
fn pass_through_is_bit_exact_at_48000_hz() {
    pass_through_grid(48_000);
}

#[test]
fn pass_through_is_bit_exact_at_96000_hz() {
    pass_through_grid(96_000);
}

#[test]
fn pass_through_is_bit_exact_at_192000_hz() {
    pass_through_grid(192_000);
}

#[test]
fn offline_sine_level_and_count_at_44100_hz() {
    level_grid(44_100);
}

#[test]
fn offline_sine_level_and_count_at_48000_hz() {
    level_grid(48_000);
}

#[test]
fn offline_sine_level_and_count_at_96000_hz() {
    level_grid(96_000);
}

#[test]
fn offline_sine_level_and_count_at_192000_hz() {
    level_grid(192_000);
}

#[test]
fn the_plugin_offers_stereo_and_mono_layouts() {
    let mut plugin = new_plugin();
    for channels in [2, 1, 2] {
        plugin
            .select_channels(channels)
            .unwrap_or_else(|err| panic!("{channels} ch: {}", describe(&err)));
        let ports = plugin
            .main_port_channels()
            .unwrap_or_else(|err| panic!("{channels} ch: {}", describe(&err)));
        assert_eq!(
            ports,
            (channels, channels),
            "main in/out after selecting {channels} ch"
        );
    }
    assert!(
        plugin.select_channels(3).is_err(),
        "a 3-channel layout does not exist"
    );
    println!("layouts: stereo and mono selectable, 3 channels refused");
}

/// Realtime mode: a host pushing audio much faster than real time floods the ring, which drops
/// and counts; nothing is lost from the accounting.
#[test]
fn realtime_flood_drops_and_accounts_for_every_sample() {
    const RATE_HZ: u32 = 192_000;
    const BLOCK: u32 = 16_384;
    const SECONDS: usize = 20;
    const ATTEMPTS: usize = 3;
    let cell = Cell {
        rate_hz: RATE_HZ,
        block: BLOCK,
        channels: 2,
    };
    let start = Instant::now();
    let mut rng = SmallRng::seed_from_u64(SEED);
    let mut buffers = Buffers::new(cell.channels, cell.block);
    for input in &mut buffers.inputs {
        input.fill_with(|| rng.gen_range(-0.5..0.5));
    }
    let blocks = SECONDS * RATE_HZ as usize / BLOCK as usize;
    let mut dropped_any = false;
    let mut attempts = 0;
    while !dropped_any && attempts < ATTEMPTS {
        attempts += 1;
        let mut plugin = new_plugin();
        activate(&mut plugin, cell.settings(false), &cell);
        for b in 0..blocks {
            let what = format!("{cell}, realtime flood, block {b}");
            buffers.process(&mut plugin, BLOCK as usize, &what);
            if b == 0 || b + 1 == blocks {
                buffers.assert_bit_exact(BLOCK as usize, &what);
            }
        }
        let s = deactivate(&mut plugin, &cell);
        let pushed = (blocks * BLOCK as usize) as u64;
        assert_eq!(
            s.samples_analysed + s.samples_dropped,
            pushed,
            "[{cell}] attempt {attempts}: analysed + dropped must equal pushed: {s:?}"
        );
        assert!(!s.offline, "[{cell}] {s:?}");
        println!(
            "realtime flood, attempt {attempts}: {pushed} frames pushed, {} analysed, {} dropped \
             ({:.0} %)",
            s.samples_analysed,
            s.samples_dropped,
            100.0 * s.samples_dropped as f64 / pushed as f64
        );
        dropped_any = s.samples_dropped > 0;
    }
    assert!(
        dropped_any,
        "{ATTEMPTS} floods of {SECONDS} s at {RATE_HZ} Hz never filled the ring: the realtime \
         path should drop when the host outruns the analysis"
    );
    println!(
        "realtime flood: dropped after {attempts} attempt(s), {:.1} s",
        start.elapsed().as_secs_f64()
    );
}

/// The `response_ms` value inside saved state (nice-plug tags parameter values with their type:
/// `"response_ms": {"f32": 300.0}`).
fn response_ms(bytes: &[u8]) -> f64 {
    let json = state_format::decode(bytes).unwrap_or_else(|| {
        panic!(
            "saved state is not an 8-byte LE length + JSON: {:?}",
            String::from_utf8_lossy(bytes)
        )
    });
    json["params"]["response_ms"]["f32"]
        .as_f64()
        .unwrap_or_else(|| panic!("no params.response_ms.f32 in {json}"))
}

/// Saved state with `response_ms` replaced.
fn with_response_ms(bytes: &[u8], value: f64) -> Vec<u8> {
    let mut json = state_format::decode(bytes).expect("saved state decodes");
    json["params"]["response_ms"] = serde_json::json!({ "f32": value });
    state_format::encode(&json)
}

fn saved(plugin: &mut WeftPlugin) -> Vec<u8> {
    plugin
        .save_state()
        .unwrap_or_else(|err| panic!("save failed: {}", describe(&err)))
}

/// The smoothed level the analysis should report after `signal`, recomputed from its definition
/// in `plugin/src/analysis.rs`: frame power from the frame's RMS in dBFS, then a one-pole
/// smoother on power with coefficient `a = exp(−hop_s / τ)`, τ = `response_ms` (the standard
/// impulse-invariant one-pole, e.g. J. O. Smith, "Introduction to Digital Filters", 2007), from
/// zero. Frames as in [`expected_frames`]: centred, zero-padded before the signal.
fn expected_smoothed_db(signal: &[f32], rate_hz: u32, response_ms: f64) -> f64 {
    let n = frame_len(rate_hz);
    let hop = n / 4;
    let half = n / 2;
    let a = (-(hop as f64 / f64::from(rate_hz)) / (response_ms / 1000.0)).exp();
    let mut smoothed = 0.0_f64;
    for k in 0..expected_frames(signal.len(), n) as usize {
        let start = k * hop;
        // Padded index j maps to signal index j − half.
        let power: f64 = (start..start + n)
            .filter_map(|j| j.checked_sub(half).and_then(|i| signal.get(i)))
            .map(|&x| f64::from(x) * f64::from(x))
            .sum::<f64>()
            / n as f64;
        // The plugin stores the frame level as f32 dBFS and converts back to power.
        let rms_db = (10.0 * power.log10()) as f32;
        let power = 10f64.powf(f64::from(rms_db) / 10.0);
        smoothed = a * smoothed + (1.0 - a) * power;
    }
    10.0 * smoothed.log10()
}

/// Runs the 1.5 s sine offline at one cell and returns the snapshot.
fn sine_snapshot(plugin: &mut WeftPlugin, cell: Cell) -> (Snapshot, Vec<f32>) {
    let total = (LEVEL_DURATION_S * f64::from(cell.rate_hz)).round() as usize;
    activate(plugin, cell.settings(true), &cell);
    run_sine(plugin, cell, total);
    let snapshot = deactivate(plugin, &cell);
    let signal = (0..total).map(|n| sine(cell.rate_hz, n)).collect();
    (snapshot, signal)
}

#[test]
fn state_round_trips_and_reaches_the_analysis() {
    let start = Instant::now();
    let mut a = new_plugin();
    let state_a = saved(&mut a);
    let json = state_format::decode(&state_a).expect("state is an 8-byte LE length + JSON");
    println!(
        "saved state: {} bytes = 8-byte little-endian length {} + JSON {json}",
        state_a.len(),
        state_a.len() - 8
    );
    assert_eq!(response_ms(&state_a), 300.0, "default response time");

    let modified = with_response_ms(&state_a, 1234.0);
    let mut b = new_plugin();
    b.load_state(&modified)
        .unwrap_or_else(|err| panic!("loading modified state: {}", describe(&err)));
    let state_b = saved(&mut b);
    assert_eq!(
        response_ms(&state_b),
        1234.0,
        "response time after the round trip"
    );
    assert_eq!(
        response_ms(&saved(&mut a)),
        300.0,
        "instance A is unaffected"
    );

    // The loaded value drives the analysis: the smoothed level follows the one-pole formula with
    // τ = 1234 ms in B and 300 ms in A.
    let cell = Cell {
        rate_hz: 48_000,
        block: 512,
        channels: 2,
    };
    let mut readings = Vec::new();
    for (name, plugin, response) in [("A", &mut a, 300.0), ("B", &mut b, 1234.0)] {
        let (s, signal) = sine_snapshot(plugin, cell);
        let expected = expected_smoothed_db(&signal, cell.rate_hz, response);
        assert!(
            (f64::from(s.rms_smoothed_db) - expected).abs() <= SMOOTHING_TOLERANCE_DB,
            "[{cell}] instance {name}, response {response} ms: smoothed {} dBFS, expected \
             {expected:.5}: {s:?}",
            s.rms_smoothed_db
        );
        readings.push(s.rms_smoothed_db);
    }
    assert!(
        readings[0] - readings[1] > 1.0,
        "a slower response must read lower after 1.5 s: {readings:?}"
    );
    println!(
        "state round trip: response_ms 300 → 1234 ms, smoothed levels {readings:?} dBFS match \
         the formula, {:.1} s",
        start.elapsed().as_secs_f64()
    );
}

/// Bytes the plugin must refuse, each with a name for messages.
fn garbage_states(valid: &[u8], rng: &mut SmallRng) -> Vec<(&'static str, Vec<u8>)> {
    let mut random = |n: usize| {
        let mut v = vec![0_u8; n];
        rng.fill_bytes(&mut v);
        v
    };
    let with_len = |len: u64, body: &[u8]| {
        let mut v = len.to_le_bytes().to_vec();
        v.extend_from_slice(body);
        v
    };
    let body = random(64);
    vec![
        ("empty", Vec::new()),
        ("three bytes", random(3)),
        ("random 4 KiB", random(4096)),
        ("length u64::MAX", with_len(u64::MAX, &body)),
        ("length past the end", with_len(1000, &body)),
        ("random body", with_len(body.len() as u64, &body)),
        ("not JSON", with_len(10, b"not json {")),
        ("truncated valid state", valid[..valid.len() / 2].to_vec()),
        (
            "JSON without params",
            state_format::encode(&serde_json::json!({"version": "0.1.0"})),
        ),
    ]
}

#[test]
fn garbage_state_is_refused_and_audio_still_passes() {
    let start = Instant::now();
    let mut rng = SmallRng::seed_from_u64(SEED);
    let mut plugin = new_plugin();
    let known = with_response_ms(&saved(&mut plugin), 777.0);
    plugin
        .load_state(&known)
        .unwrap_or_else(|err| panic!("loading valid state: {}", describe(&err)));
    let garbage = garbage_states(&known, &mut rng);

    // Inactive: refused, and the previous value stays.
    for (name, bytes) in &garbage {
        assert!(
            plugin.load_state(bytes).is_err(),
            "garbage state '{name}' was accepted (seed {SEED:#x})"
        );
        assert_eq!(
            response_ms(&saved(&mut plugin)),
            777.0,
            "garbage state '{name}' changed the response time"
        );
    }

    // Active, between blocks: refused, and audio keeps passing bit for bit.
    let cell = Cell {
        rate_hz: 48_000,
        block: 512,
        channels: 2,
    };
    activate(&mut plugin, cell.settings(false), &cell);
    let mut buffers = Buffers::new(cell.channels, cell.block);
    let mut frames = 0_u64;
    for (round, (name, bytes)) in garbage.iter().enumerate() {
        for block in 0..4 {
            for input in &mut buffers.inputs {
                input.fill_with(|| f32::from_bits(rng.next_u32()));
            }
            buffers.fill_sentinel(512);
            let what = format!("{cell}, after garbage '{name}' (round {round}), block {block}");
            buffers.process(&mut plugin, 512, &what);
            buffers.assert_bit_exact(512, &what);
            frames += 512;
        }
        assert!(
            plugin.load_state(bytes).is_err(),
            "garbage state '{name}' was accepted while active (seed {SEED:#x})"
        );
    }
    assert!(
        !plugin.restart_requested(),
        "refused state must not ask for a restart"
    );
    let s = deactivate(&mut plugin, &cell);
    assert_eq!(s.samples_analysed + s.samples_dropped, frames, "{s:?}");
    assert_eq!(response_ms(&saved(&mut plugin)), 777.0);
    println!(
        "garbage state: {} kinds refused inactive and active, audio bit-exact after each, {:.1} s",
        garbage.len(),
        start.elapsed().as_secs_f64()
    );
}

/// State written by another tool may hold values outside the parameter's range (20–5000 ms);
/// only valid settings may reach the analysis.
#[test]
fn out_of_range_response_time_is_held_to_its_range() {
    let cell = Cell {
        rate_hz: 48_000,
        block: 512,
        channels: 1,
    };
    let mut readings = Vec::new();
    for (stored, effective) in [(1.0e6, 5000.0), (-50.0, 20.0)] {
        let mut plugin = new_plugin();
        let bytes = with_response_ms(&saved(&mut plugin), stored);
        let loaded = plugin.load_state(&bytes);
        let (s, signal) = sine_snapshot(&mut plugin, cell);
        let expected = expected_smoothed_db(&signal, cell.rate_hz, effective);
        println!(
            "response_ms {stored} in state: load {}, saved back as {}, smoothed {} dBFS \
             (expected {expected:.5} for {effective} ms)",
            if loaded.is_ok() {
                "accepted"
            } else {
                "refused"
            },
            response_ms(&saved(&mut plugin)),
            s.rms_smoothed_db
        );
        readings.push((stored, s.rms_smoothed_db, expected));
        if loaded.is_err() {
            // Refusing is fine too: then the default (300 ms) must still be in force.
            let default = expected_smoothed_db(&signal, cell.rate_hz, 300.0);
            assert!(
                (f64::from(s.rms_smoothed_db) - default).abs() <= SMOOTHING_TOLERANCE_DB,
                "[{cell}] refused state changed the smoothing: {s:?}"
            );
            continue;
        }
        assert!(
            (f64::from(s.rms_smoothed_db) - expected).abs() <= SMOOTHING_TOLERANCE_DB,
            "[{cell}] response_ms {stored} from state reached the analysis unclamped: smoothed \
             {} dBFS, expected {expected:.5} for the range limit {effective} ms: {s:?}",
            s.rms_smoothed_db
        );
    }
    println!("out-of-range response time: {readings:?}");
}
