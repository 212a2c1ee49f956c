//! The one-way road from the audio thread to the analysis thread.
//!
//! A single-producer/single-consumer ring (rtrb) of `[mid, side]` pairs, allocated when the plugin
//! is activated, plus a drop counter. [`ring`] builds both halves at once. The audio side never
//! locks, allocates or makes a system call: when the ring is full it drops the rest of the block
//! and counts it — except in offline rendering, where it waits for room so that nothing is lost.

use rtrb::{Consumer, Producer, RingBuffer};
use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

/// Seconds of audio the ring holds (common practice: enough to ride out a slow GUI frame or a
/// descheduled analysis thread, small enough to keep the display current).
pub const RING_CAPACITY_S: f64 = 2.0;

/// The audio thread's half: pushes the analysis signal.
pub struct AudioSide {
    producer: Producer<[f32; 2]>,
    dropped: Arc<AtomicU64>,
}

/// The analysis thread's half: pops the analysis signal.
pub struct AnalysisSide {
    /// The ring's reading end.
    pub consumer: Consumer<[f32; 2]>,
    /// Samples the audio thread dropped because the ring was full.
    pub dropped: Arc<AtomicU64>,
}

/// Builds a ring holding `capacity` samples and returns its two halves. Allocates: call it from
/// `activate()`, never from `process()`.
pub fn ring(capacity: usize) -> (AudioSide, AnalysisSide) {
    let (producer, consumer) = RingBuffer::new(capacity.max(1));
    let dropped = Arc::new(AtomicU64::new(0));
    (
        AudioSide {
            producer,
            dropped: dropped.clone(),
        },
        AnalysisSide { consumer, dropped },
    )
}

/// The ring capacity for a sample rate and the host's largest block, in samples.
pub fn capacity_for(sample_rate_hz: f32, max_block: u32) -> usize {
    let seconds = (f64::from(sample_rate_hz) * RING_CAPACITY_S).ceil() as usize;
    seconds.max(4 * max_block as usize)
}

impl AudioSide {
    /// Downmixes one block of channels (all of equal length; one or two channels) to mid and side
    /// and pushes it. With `wait` (offline rendering) it waits for room instead of dropping, unless
    /// the analysis side is gone. Never allocates or locks.
    pub fn push_block(&mut self, channels: &[&mut [f32]], wait: bool) {
        let Some(first) = channels.first() else {
            return;
        };
        let len = first.len();
        let mut done = 0;
        while done < len {
            let room = self.producer.slots().min(len - done);
            if room == 0 {
                if wait && !self.producer.is_abandoned() {
                    // Offline only: the host renders as fast as we allow, so let the analysis
                    // thread run.
                    std::thread::yield_now();
                    continue;
                }
                self.dropped
                    .fetch_add((len - done) as u64, Ordering::Relaxed);
                return;
            }
            let Ok(chunk) = self.producer.write_chunk_uninit(room) else {
                return;
            };
            let range = done..done + room;
            match channels {
                [mono] => chunk.fill_from_iter(mono[range].iter().map(|&x| [x, 0.0])),
                [left, right, ..] => chunk.fill_from_iter(
                    left[range.clone()]
                        .iter()
                        .zip(&right[range])
                        .map(|(&l, &r)| [0.5 * (l + r), 0.5 * (l - r)]),
                ),
                [] => 0,
            };
            done += room;
        }
    }

    /// Samples dropped so far.
    pub fn dropped(&self) -> u64 {
        self.dropped.load(Ordering::Relaxed)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stereo_becomes_mid_and_side() {
        let (mut audio, mut analysis) = ring(8);
        let mut l = [1.0_f32, 0.5];
        let mut r = [0.0_f32, -0.5];
        audio.push_block(&[&mut l, &mut r], false);
        assert_eq!(analysis.consumer.pop(), Ok([0.5, 0.5]));
        assert_eq!(analysis.consumer.pop(), Ok([0.0, 0.5]));
    }

    #[test]
    fn a_full_ring_drops_and_counts() {
        let (mut audio, analysis) = ring(4);
        let mut x = [0.25_f32; 10];
        audio.push_block(&[&mut x], false);
        assert_eq!(analysis.consumer.slots(), 4);
        assert_eq!(audio.dropped(), 6);
    }

    #[test]
    fn offline_waits_for_room_and_loses_nothing() {
        let (mut audio, mut analysis) = ring(16);
        let reader = std::thread::spawn(move || {
            let mut got = Vec::new();
            while got.len() < 1000 {
                if let Ok(v) = analysis.consumer.pop() {
                    got.push(v[0]);
                }
            }
            got
        });
        let mut x: Vec<f32> = (0..1000).map(|i| i as f32).collect();
        audio.push_block(&[&mut x], true);
        let got = reader.join().expect("reader thread");
        assert_eq!(got, (0..1000).map(|i| i as f32).collect::<Vec<_>>());
        assert_eq!(audio.dropped(), 0);
    }
}
