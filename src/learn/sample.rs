//! A uniform sample of patch positions over all images, in one streaming pass.
//!
//! Every valid patch position (the patch wholly inside its image) gets a
//! pseudo-random 64-bit key from the seed, the image's content digest and the
//! position; the sample is the `capacity` positions with the smallest keys
//! (ties broken by image and position). Keeping the smallest keys of a stream
//! is reservoir sampling by random priorities: every position is equally
//! likely, and which ones are kept depends on neither the order images arrive
//! in nor the number of threads (Efraimidis & Spirakis 2006, "Weighted random
//! sampling with a reservoir", IPL 97(5), with equal weights; from memory).
//!
//! Memory is the sample and nothing more: a bounded heap of keys with one
//! slot of patch samples each. A position's patch is copied (and normalised)
//! only when its key enters the heap; once the heap is full, a shared
//! threshold (the largest key held) lets each image skip almost every position
//! with one compare, before taking the lock.

use std::cmp::Ordering;
use std::collections::BinaryHeap;
use std::sync::atomic::{AtomicU64, Ordering as AtomicOrdering};
use std::sync::Mutex;

use super::rng::mix;

/// One held position.
#[derive(Debug, Clone, Copy)]
struct Entry {
    key: u64,
    image: u64,
    pos: u64,
    /// Index of the input it came from (for the provenance counts).
    input: u32,
    slot: u32,
}

impl Entry {
    fn rank(&self) -> (u64, u64, u64) {
        (self.key, self.image, self.pos)
    }
}

impl PartialEq for Entry {
    fn eq(&self, o: &Self) -> bool {
        self.rank() == o.rank()
    }
}
impl Eq for Entry {}
impl PartialOrd for Entry {
    fn partial_cmp(&self, o: &Self) -> Option<Ordering> {
        Some(self.cmp(o))
    }
}
impl Ord for Entry {
    fn cmp(&self, o: &Self) -> Ordering {
        self.rank().cmp(&o.rank())
    }
}

struct Held {
    heap: BinaryHeap<Entry>,
    store: Vec<f32>,
}

/// The sample being drawn, shared by the threads reading images.
pub struct Reservoir {
    capacity: usize,
    dim: usize,
    seed: u64,
    held: Mutex<Held>,
    /// The largest key held once full (`u64::MAX` before).
    threshold: AtomicU64,
}

/// The drawn sample: patches in key order, and where each came from.
pub struct Drawn {
    /// `n × dim` samples, row-major.
    pub data: Vec<f32>,
    /// Input index of each row.
    pub inputs: Vec<u32>,
}

impl Reservoir {
    /// A reservoir for `capacity` patches of `dim` samples, keyed by `seed`.
    pub fn new(capacity: usize, dim: usize, seed: u64) -> Reservoir {
        Reservoir {
            capacity,
            dim,
            seed,
            held: Mutex::new(Held {
                heap: BinaryHeap::with_capacity(capacity.min(1 << 20)),
                store: Vec::new(),
            }),
            threshold: AtomicU64::new(u64::MAX),
        }
    }

    /// Offers every one of `positions` positions of one image (identified by
    /// `image`, a digest of its content, and `input`, its index in the job):
    /// `fill(pos, slot)` writes the patch at `pos` into `slot` when it is taken.
    pub fn offer(
        &self,
        image: u64,
        input: u32,
        positions: u64,
        mut fill: impl FnMut(u64, &mut [f32]),
    ) {
        if self.capacity == 0 {
            return;
        }
        let base = mix(self.seed ^ mix(image));
        let mut below = self.threshold.load(AtomicOrdering::Relaxed);
        let mut candidates: Vec<(u64, u64)> = Vec::new();
        for pos in 0..positions {
            let key = key_of(base, pos);
            if key <= below {
                candidates.push((key, pos));
                // Never hold more than the sample's worth of candidates.
                if candidates.len() >= 2 * self.capacity.max(1024) {
                    keep_smallest(&mut candidates, self.capacity);
                    below = below.min(candidates.last().map_or(u64::MAX, |c| c.0));
                    below = below.min(self.threshold.load(AtomicOrdering::Relaxed));
                }
            }
        }
        keep_smallest(&mut candidates, self.capacity);
        let mut held = self.held.lock().unwrap_or_else(|p| p.into_inner());
        let dim = self.dim;
        for (key, pos) in candidates {
            let e = Entry {
                key,
                image,
                pos,
                input,
                slot: 0,
            };
            if held.heap.len() < self.capacity {
                let slot = held.heap.len();
                held.store.resize((slot + 1) * dim, 0.0);
                fill(pos, &mut held.store[slot * dim..(slot + 1) * dim]);
                held.heap.push(Entry {
                    slot: slot as u32,
                    ..e
                });
            } else {
                let worst = *held.heap.peek().expect("full");
                if e >= worst {
                    continue;
                }
                let slot = worst.slot as usize;
                let Held { heap, store } = &mut *held;
                fill(pos, &mut store[slot * dim..(slot + 1) * dim]);
                *heap.peek_mut().expect("full") = Entry {
                    slot: worst.slot,
                    ..e
                };
            }
        }
        if held.heap.len() == self.capacity {
            let top = held.heap.peek().map_or(u64::MAX, |e| e.key);
            self.threshold.store(top, AtomicOrdering::Relaxed);
        }
    }

    /// The sample, in key order (the same for any thread count).
    pub fn into_drawn(self) -> Drawn {
        let held = self.held.into_inner().unwrap_or_else(|p| p.into_inner());
        let entries = held.heap.into_sorted_vec();
        let dim = self.dim;
        let mut data = Vec::with_capacity(entries.len() * dim);
        for e in &entries {
            let s = e.slot as usize;
            data.extend_from_slice(&held.store[s * dim..(s + 1) * dim]);
        }
        Drawn {
            data,
            inputs: entries.iter().map(|e| e.input).collect(),
        }
    }
}

/// The key of position `pos` of an image whose keys start from `base`: one
/// step of SplitMix64's stream (Steele, Lea & Flood 2014), so neighbouring
/// positions get unrelated keys.
fn key_of(base: u64, pos: u64) -> u64 {
    mix(base.wrapping_add(pos.wrapping_add(1).wrapping_mul(super::rng::GAMMA)))
}

/// Keeps the `n` smallest candidates, sorted.
fn keep_smallest(c: &mut Vec<(u64, u64)>, n: usize) {
    if c.len() > n {
        if n == 0 {
            c.clear();
            return;
        }
        c.select_nth_unstable(n - 1);
        c.truncate(n);
    }
    c.sort_unstable();
}

#[cfg(test)]
mod tests {
    use super::*;

    fn draw(order: &[u64], cap: usize) -> Vec<f32> {
        let r = Reservoir::new(cap, 1, 7);
        for &img in order {
            r.offer(img, img as u32, 1000, |pos, s| {
                s[0] = (img * 10_000 + pos) as f32
            });
        }
        r.into_drawn().data
    }

    #[test]
    fn the_sample_does_not_depend_on_the_order_of_images() {
        let a = draw(&[1, 2, 3, 4], 300);
        let b = draw(&[4, 2, 3, 1], 300);
        assert_eq!(a.len(), 300);
        assert_eq!(a, b);
    }

    #[test]
    fn positions_are_taken_about_equally_often() {
        // 2 images × 1000 positions, 500 kept, over 400 seeds: each position is
        // kept with probability 1/4. The busiest and idlest of 2000 positions
        // stay within 5 standard deviations (σ = sqrt(400·¼·¾) ≈ 8.7).
        let mut counts = vec![0u32; 2000];
        for seed in 0..400 {
            let r = Reservoir::new(500, 1, seed);
            for img in 0..2u64 {
                r.offer(img, img as u32, 1000, |pos, s| {
                    s[0] = (img * 1000 + pos) as f32
                });
            }
            for v in r.into_drawn().data {
                counts[v as usize] += 1;
            }
        }
        let (lo, hi) = (*counts.iter().min().unwrap(), *counts.iter().max().unwrap());
        assert!(lo as f64 > 100.0 - 5.0 * 8.7, "least taken {lo}");
        assert!((hi as f64) < 100.0 + 5.0 * 8.7, "most taken {hi}");
    }
}
