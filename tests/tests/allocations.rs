//! The engine allocates nothing per iteration: every buffer is made once per run, so the
//! number of heap allocations of a run does not depend on how many iterations it takes. Each
//! configuration is run with T and with 3T iterations (or temperatures) and the two counts
//! must be equal. (No allocation in the hot loop is common practice for numerical kernels;
//! this test makes it a checked property.)
//!
//! A counting global allocator sees every allocation of this test binary, so everything runs
//! in one test function, on one thread.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicU64, Ordering};

mod common;

use assay::engine::Smc;
use assay::settings::{Resampling, SamplerSettings};
use assay::{RunContext, Sampler};
use assay_targets::gaussian::Gaussian;
use common::all_configurations;

struct Counting;

static ALLOCATIONS: AtomicU64 = AtomicU64::new(0);

// SAFETY: every method forwards to the system allocator with the caller's arguments.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        unsafe { System.alloc(layout) }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        unsafe { System.alloc_zeroed(layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        ALLOCATIONS.fetch_add(1, Ordering::Relaxed);
        unsafe { System.realloc(ptr, layout, new_size) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static GLOBAL: Counting = Counting;

/// Allocations made by one run of `settings` (sampler construction included).
fn allocations_of(settings: &SamplerSettings, target: &Gaussian) -> u64 {
    let before = ALLOCATIONS.load(Ordering::Relaxed);
    let sampler = Smc::new(settings.clone()).expect("valid settings");
    let out = sampler.run(target, &RunContext::with_seed(11));
    assert!(out.is_ok(), "{settings:?}: {:?}", out.error);
    drop(out);
    drop(sampler);
    ALLOCATIONS.load(Ordering::Relaxed) - before
}

#[test]
fn allocations_do_not_grow_with_iterations() {
    let target = Gaussian::new(4, &[0.5], &[1.5], 0.4).expect("target");
    let configurations = all_configurations();
    let mut checked = 0;
    for base in &configurations {
        for resampling in [
            Resampling::Multinomial,
            Resampling::Systematic,
            Resampling::Stratified,
            Resampling::Residual,
        ] {
            let at = |t: usize| SamplerSettings {
                iterations: t,
                steps: t,
                resampling,
                // Resample at every iteration, so that the resampling step runs each time.
                ess_threshold: 1.0,
                ..base.clone()
            };
            let short = allocations_of(&at(5), &target);
            let long = allocations_of(&at(15), &target);
            // The buffers of a run are allocations too: the counter does see them.
            assert!(short > 0);
            assert_eq!(
                short, long,
                "{base:?} {resampling:?}: {short} allocations with 5 iterations, {long} with 15"
            );
            checked += 1;
        }
    }
    assert_eq!(checked, configurations.len() * 4);
    assert!(checked >= 2 * 2 * 5 * 4);
}
