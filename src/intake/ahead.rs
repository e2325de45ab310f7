//! Frames decoded ahead of the engine as jobs on the engine's own rayon pool.
//!
//! Replay and the bench's overlapped pass used to decode on a reader thread of their own beside
//! the pool's threads: on 2 cores that is three busy threads on two cores, and a pool worker that
//! had taken half of a fork-join (ensemble members, block matching) could wait a scheduler time
//! slice (~4 ms) behind the reader while the engine's thread waited for it. Here the decodes are
//! pool jobs instead: a pool of as many threads as cores runs the engine on one worker and the
//! decodes on whichever worker is free, and a worker waiting inside a fork-join runs a decode
//! meanwhile. Frames come out in order and each is decoded exactly once, so what the engine sees
//! does not change.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Condvar, Mutex};

struct Slot<T> {
    /// Set by whoever decodes the frame (a pool job or the engine itself), so it is decoded once.
    claimed: AtomicBool,
    value: Mutex<Option<T>>,
    ready: Condvar,
}

/// Frames `0..n` decoded by `decode(i)`, at most `depth` ahead of the one the engine takes.
/// Use inside [`rayon::scope_fifo`] (which runs on a pool worker): [`Ahead::take`] hands out frame `i`
/// after spawning the decodes up to `i + depth` into the scope.
pub struct Ahead<'a, T> {
    slots: Vec<Slot<T>>,
    decode: &'a (dyn Fn(usize) -> T + Sync),
    depth: usize,
    stop: AtomicBool,
}

impl<'a, T: Send> Ahead<'a, T> {
    /// `n` frames, decoded up to `depth` (at least 1) ahead of the engine.
    pub fn new(n: usize, depth: usize, decode: &'a (dyn Fn(usize) -> T + Sync)) -> Self {
        let slots = (0..n).map(|_| Slot { claimed: AtomicBool::new(false), value: Mutex::new(None), ready: Condvar::new() }).collect();
        Self { slots, decode, depth: depth.max(1), stop: AtomicBool::new(false) }
    }

    /// Decode frame `i` here if nobody has claimed it; true if this call decoded it. A pool job
    /// (`job`) does nothing after [`Ahead::stop`].
    fn run(&self, i: usize, job: bool) -> bool {
        let slot = &self.slots[i];
        if (job && self.stop.load(Ordering::Relaxed)) || slot.claimed.swap(true, Ordering::AcqRel) {
            return false;
        }
        let v = (self.decode)(i);
        let mut g = slot.value.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
        *g = Some(v);
        slot.ready.notify_all();
        true
    }

    /// Spawn the decode of frame `i` (before any frame is taken, `0..depth` are spawned by the
    /// first [`Ahead::take`]).
    fn spawn<'s>(&'s self, scope: &rayon::ScopeFifo<'s>, i: usize)
    where
        T: 's,
    {
        if i < self.slots.len() {
            scope.spawn_fifo(move |_| {
                self.run(i, true);
            });
        }
    }

    /// Frame `i`'s decode, `i` counting up from 0 one at a time. Spawns the decode of frame
    /// `i + depth` (and at the first call of `0..=depth`); if frame `i` is not claimed yet the
    /// calling thread decodes it; while another worker decodes it, the calling thread decodes a
    /// later unclaimed frame, or waits.
    pub fn take<'s>(&'s self, scope: &rayon::ScopeFifo<'s>, i: usize) -> T
    where
        T: 's,
    {
        if i == 0 {
            for k in 1..=self.depth {
                self.spawn(scope, k);
            }
        } else {
            self.spawn(scope, i + self.depth);
        }
        self.run(i, false);
        let mut later = i + 1;
        let slot = &self.slots[i];
        let mut g = slot.value.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
        loop {
            if let Some(v) = g.take() {
                return v;
            }
            // Another worker is decoding frame i: decode a later frame meanwhile, if one is free.
            while later <= i + self.depth && later < self.slots.len() && self.slots[later].claimed.load(Ordering::Acquire) {
                later += 1;
            }
            if later <= i + self.depth && later < self.slots.len() {
                drop(g);
                self.run(later, true);
                g = slot.value.lock().unwrap_or_else(std::sync::PoisonError::into_inner);
            } else {
                g = slot.ready.wait(g).unwrap_or_else(std::sync::PoisonError::into_inner);
            }
        }
    }

    /// Stop decoding frames not yet claimed (the engine stopped early).
    pub fn stop(&self) {
        self.stop.store(true, Ordering::Relaxed);
    }

    /// A guard that calls [`Ahead::stop`] when dropped: made at the top of the scope's closure, it
    /// stops the decodes still queued however the engine's loop ends (an error, a `?`, a panic),
    /// before the scope waits for them. After the last frame is taken there are none left.
    pub fn stop_on_exit(&self) -> StopOnExit<'_> {
        StopOnExit(&self.stop)
    }
}

/// See [`Ahead::stop_on_exit`].
pub struct StopOnExit<'a>(&'a AtomicBool);

impl Drop for StopOnExit<'_> {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frames_come_in_order_each_decoded_once() {
        for threads in [1, 2, 3] {
            let pool = rayon::ThreadPoolBuilder::new().num_threads(threads).build().unwrap();
            let calls = std::sync::atomic::AtomicUsize::new(0);
            let decode = |i: usize| {
                calls.fetch_add(1, Ordering::Relaxed);
                // Uneven work, so that workers overtake each other.
                let mut x = i as u64;
                for _ in 0..(i % 7) * 20_000 {
                    x = x.wrapping_mul(6364136223846793005).wrapping_add(1);
                }
                (i, x)
            };
            let ahead = Ahead::new(50, 4, &decode);
            let got: Vec<usize> = pool.install(|| {
                rayon::scope_fifo(|s| {
                    (0..50)
                        .map(|i| {
                            // Some engine work with a fork-join in it, as the step has.
                            let (a, b) = rayon::join(|| i * 2, || i * 3);
                            assert_eq!(a + b, i * 5);
                            ahead.take(s, i).0
                        })
                        .collect()
                })
            });
            assert_eq!(got, (0..50).collect::<Vec<_>>());
            assert_eq!(calls.load(Ordering::Relaxed), 50);
        }
    }

    #[test]
    fn a_stop_leaves_later_frames_undecoded() {
        let calls = std::sync::atomic::AtomicUsize::new(0);
        let decode = |i: usize| {
            calls.fetch_add(1, Ordering::Relaxed);
            i
        };
        let ahead = Ahead::new(100, 3, &decode);
        let pool = rayon::ThreadPoolBuilder::new().num_threads(2).build().unwrap();
        // Stopped before the first take: the decodes it spawns (frames 1–3) do nothing, while the
        // frame the engine takes is still decoded by the engine itself. Without the stop, all four
        // would be decoded by the time the scope ends.
        ahead.stop();
        pool.install(|| {
            rayon::scope_fifo(|s| {
                assert_eq!(ahead.take(s, 0), 0);
            })
        });
        assert_eq!(calls.load(Ordering::Relaxed), 1);
    }

    /// The guard stops the queued decodes when the engine's loop leaves early: the first take
    /// queues frames 1–3, and the loop ends before any worker has run them.
    #[test]
    fn leaving_the_loop_stops_the_queued_decodes() {
        let calls = std::sync::atomic::AtomicUsize::new(0);
        let decode = |i: usize| {
            calls.fetch_add(1, Ordering::Relaxed);
            i
        };
        let ahead = Ahead::new(100, 3, &decode);
        // One thread: the queued decodes can only run once the loop's closure has returned.
        let pool = rayon::ThreadPoolBuilder::new().num_threads(1).build().unwrap();
        let r: Result<(), usize> = pool.install(|| {
            rayon::scope_fifo(|s| {
                let _stop = ahead.stop_on_exit();
                let first = ahead.take(s, 0);
                Err(first)
            })
        });
        assert_eq!(r, Err(0));
        assert_eq!(calls.load(Ordering::Relaxed), 1);
    }
}
