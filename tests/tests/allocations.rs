//! The engine allocates nothing per iteration: every buffer is made once per run, so the
//! number of heap allocations of a run does not depend on how many iterations it takes. Each
//! configuration is run with T and with 3T iterations (or temperatures) and the two counts
//! must be equal. (No allocation in the hot loop is common practice for numerical kernels;
//! this test makes it a checked property.)
//!
//! A counting global allocator sees every allocation of this test binary; it counts those of
//! the calling thread only (a thread-local counter), so that the test harness's own threads (its
//! output capture, its "running for over 60 seconds" notice on a loaded machine) cannot add to
//! a run's count. Everything runs in one test function; a run uses only its calling thread.

use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;

mod common;

use assay::engine::Smc;
use assay::settings::{Resampling, SamplerSettings};
use assay::{RunContext, Sampler};
use assay_targets::gaussian::Gaussian;
use common::all_configurations;

struct Counting;

thread_local! {
    /// Allocations made by this thread (const-initialised: reading it never allocates).
    static ALLOCATIONS: Cell<u64> = const { Cell::new(0) };
}

/// Count one allocation of the calling thread (none while its thread-local is torn down).
fn count() {
    let _ = ALLOCATIONS.try_with(|c| c.set(c.get() + 1));
}

fn allocations() -> u64 {
    ALLOCATIONS.with(Cell::get)
}

// SAFETY: every method forwards to the system allocator with the caller's arguments.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        count();
        unsafe { System.alloc(layout) }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        count();
        unsafe { System.alloc_zeroed(layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        count();
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
    let before = allocations();
    let sampler = Smc::new(settings.clone()).expect("valid settings");
    let out = sampler.run(target, &RunContext::with_seed(11));
    assert!(out.is_ok(), "{settings:?}: {:?}", out.error);
    drop(out);
    drop(sampler);
    allocations() - before
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
