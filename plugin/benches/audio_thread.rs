//! The audio thread's cost per 512-sample stereo block, against a plain copy of the same block
//! (what a host does anyway to pass audio from input to output buffers).
//!
//! `cargo bench -p weft-plugin --bench audio_thread` prints both times; the ratio is what counts
//! (machines here are shared and noisy).

// criterion's macros generate undocumented items.
#![allow(missing_docs)]

use criterion::{Criterion, black_box, criterion_group, criterion_main};
use weft_plugin::ring;

const BLOCK: usize = 512;

fn bench(c: &mut Criterion) {
    let mut group = c.benchmark_group("audio_thread_512_stereo");
    let left: Vec<f32> = (0..BLOCK).map(|i| (i as f32 * 0.01).sin()).collect();
    let right: Vec<f32> = (0..BLOCK).map(|i| (i as f32 * 0.013).cos()).collect();

    let (mut src_l, mut src_r) = (left.clone(), right.clone());
    let (mut dst_l, mut dst_r) = (vec![0.0_f32; BLOCK], vec![0.0_f32; BLOCK]);
    group.bench_function("memcpy", |b| {
        b.iter(|| {
            dst_l.copy_from_slice(black_box(&src_l));
            dst_r.copy_from_slice(black_box(&src_r));
            black_box((&mut dst_l, &mut dst_r));
        })
    });

    let (mut audio, mut analysis) = ring::ring(ring::capacity_for(48_000.0, BLOCK as u32));
    group.bench_function("push_block", |b| {
        b.iter(|| {
            audio.push_block(black_box(&[&mut src_l[..], &mut src_r[..]]), false);
            // Keep the ring from filling; an O(1) index update for plain data.
            if let Ok(chunk) = analysis.consumer.read_chunk(BLOCK) {
                chunk.commit_all();
            }
        })
    });
    group.finish();
    assert_eq!(
        audio.dropped(),
        0,
        "the bench must measure pushing, not dropping"
    );
}

criterion_group!(benches, bench);
criterion_main!(benches);
