//! Memory of attribution at 10 000 experiments × 10 arms: every allocation of this test binary
//! is counted, so the figure is the heap the experiments hold, pending buckets included.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicIsize, Ordering};

use apportion::core::attribution::{Bucket, MAX_BUCKETS};
use apportion::core::{Experiment, ExperimentSpec, Observation, PolicyName, PolicySpec, RewardModel, Window};

struct Counting;

static HELD: AtomicIsize = AtomicIsize::new(0);

unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        HELD.fetch_add(layout.size() as isize, Ordering::Relaxed);
        unsafe { System.alloc(layout) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        HELD.fetch_sub(layout.size() as isize, Ordering::Relaxed);
        unsafe { System.dealloc(ptr, layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        HELD.fetch_add(new_size as isize - layout.size() as isize, Ordering::Relaxed);
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static COUNTING: Counting = Counting;

fn held() -> isize {
    HELD.load(Ordering::Relaxed)
}

/// Builds `n` experiments of ten arms, with or without a one-hour window, and feeds every arm
/// an impression and a reward every 3 minutes of event time for two hours: with a window each
/// arm then holds all the buckets it ever can. Returns the heap they hold, in bytes.
fn heap_of(n: usize, window: Option<Window>) -> (isize, Vec<Experiment>) {
    let arms: Vec<String> = (0..10).map(|j| format!("arm-{j}")).collect();
    let before = held();
    let mut all = Vec::with_capacity(n);
    for _ in 0..n {
        let mut spec = ExperimentSpec::new(PolicySpec::new(PolicyName::Thompson), RewardModel::Bernoulli);
        spec.attribution = window;
        let mut e = Experiment::new(spec, &arms).expect("valid experiment");
        for step in 0..40i64 {
            let ts = step * 180_000;
            for j in 0..arms.len() {
                e.observe(j, ts, Observation::Impression { count: 3 }).expect("impression");
                e.observe(j, ts, Observation::Reward { value: 1.0, impression_ms: Some(ts) }).expect("reward");
            }
        }
        all.push(e);
    }
    (held() - before - (all.capacity() * std::mem::size_of::<Experiment>()) as isize, all)
}

#[test]
fn attribution_memory_per_arm_stays_within_its_bound_at_10_000_experiments_of_10_arms() {
    let n = 10_000;
    let (plain, kept) = heap_of(n, None);
    drop(kept);
    let (windowed, kept) = heap_of(n, Some(Window { ms: 3_600_000 }));
    let arms = (n * 10) as isize;
    let full = kept.iter().flat_map(|e| e.arm_stats()).filter(|s| s.pending.len() == MAX_BUCKETS - 1 || s.pending.len() == MAX_BUCKETS).count();
    let extra_per_arm = (windowed - plain) / arms;
    println!(
        "10 000 × 10 arms: {:.1} MB without a window, {:.1} MB with a 1 h window ({extra_per_arm} B more per arm; {full} arms hold 17 or 18 buckets)",
        plain as f64 / 1e6,
        windowed as f64 / 1e6
    );
    // The bound (core::attribution): MAX_BUCKETS buckets of 32 bytes, reserved once.
    let bound = (MAX_BUCKETS * std::mem::size_of::<Bucket>()) as isize;
    assert_eq!(std::mem::size_of::<Bucket>(), 32);
    assert!(extra_per_arm <= bound, "{extra_per_arm} B per arm over the bound of {bound} B");
    assert!(full as isize >= arms * 9 / 10, "the workload fills the buckets: {full} of {arms} arms");
}
