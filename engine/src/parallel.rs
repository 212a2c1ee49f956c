//! Work spread over a few threads, for building palettes (never the live path).

/// Runs `job(i)` for `i in 0..n` on `threads` threads (each takes the next index when it is
/// free), results in order.
pub(crate) fn parallel<T: Send>(
    n: usize,
    threads: usize,
    job: impl Fn(usize) -> T + Sync,
) -> Vec<T> {
    use std::sync::Mutex;
    use std::sync::atomic::{AtomicUsize, Ordering};
    let threads = threads.clamp(1, 64).min(n.max(1));
    let next = AtomicUsize::new(0);
    let slots: Mutex<Vec<Option<T>>> = Mutex::new((0..n).map(|_| None).collect());
    std::thread::scope(|s| {
        for _ in 0..threads {
            s.spawn(|| {
                loop {
                    let i = next.fetch_add(1, Ordering::Relaxed);
                    if i >= n {
                        break;
                    }
                    let r = job(i);
                    let mut guard = slots
                        .lock()
                        .unwrap_or_else(std::sync::PoisonError::into_inner);
                    guard[i] = Some(r);
                }
            });
        }
    });
    slots
        .into_inner()
        .unwrap_or_else(std::sync::PoisonError::into_inner)
        .into_iter()
        .flatten()
        .collect()
}
