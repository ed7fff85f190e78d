//! A global allocator that counts live heap bytes and remembers the peak, so that a test binary
//! can measure how much memory one parser call needed.
//!
//! Install it in the test binary (`#[global_allocator] static A: CountingAllocator =
//! CountingAllocator;`), call [`reset_peak`] before the call and read [`peak`] after. The counts
//! are process-wide: measure one call at a time.

use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

static CURRENT: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);
static LIMIT: AtomicUsize = AtomicUsize::new(usize::MAX);

/// The system allocator, counting. Requests that would take the live total beyond
/// [`set_limit`] fail (the standard library then aborts with "memory allocation … failed"),
/// so that a runaway parser ends the fuzz run instead of the machine.
pub struct CountingAllocator;

impl CountingAllocator {
    fn admit(size: usize) -> bool {
        let now = CURRENT.fetch_add(size, Ordering::Relaxed) + size;
        if now > LIMIT.load(Ordering::Relaxed) {
            CURRENT.fetch_sub(size, Ordering::Relaxed);
            return false;
        }
        PEAK.fetch_max(now, Ordering::Relaxed);
        true
    }
}

// SAFETY: every call is forwarded to `System` with the caller's layout; the counters are only
// bookkeeping and never affect the pointers returned.
unsafe impl GlobalAlloc for CountingAllocator {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        if !Self::admit(layout.size()) {
            return std::ptr::null_mut();
        }
        let pointer = System.alloc(layout);
        if pointer.is_null() {
            CURRENT.fetch_sub(layout.size(), Ordering::Relaxed);
        }
        pointer
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        if !Self::admit(layout.size()) {
            return std::ptr::null_mut();
        }
        let pointer = System.alloc_zeroed(layout);
        if pointer.is_null() {
            CURRENT.fetch_sub(layout.size(), Ordering::Relaxed);
        }
        pointer
    }

    unsafe fn dealloc(&self, pointer: *mut u8, layout: Layout) {
        System.dealloc(pointer, layout);
        CURRENT.fetch_sub(layout.size(), Ordering::Relaxed);
    }

    unsafe fn realloc(&self, pointer: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        // A moving realloc holds both blocks for a moment: count the new one before the old
        // one is released, so the peak is never under-stated.
        if !Self::admit(new_size) {
            return std::ptr::null_mut();
        }
        let moved = System.realloc(pointer, layout, new_size);
        if moved.is_null() {
            CURRENT.fetch_sub(new_size, Ordering::Relaxed);
        } else {
            CURRENT.fetch_sub(layout.size(), Ordering::Relaxed);
        }
        moved
    }
}

/// Live heap bytes now.
pub fn current() -> usize {
    CURRENT.load(Ordering::Relaxed)
}

/// The largest number of live heap bytes since the last [`reset_peak`].
pub fn peak() -> usize {
    PEAK.load(Ordering::Relaxed)
}

/// Starts a new measurement: the peak becomes the live total.
pub fn reset_peak() {
    PEAK.store(current(), Ordering::Relaxed);
}

/// Refuses allocations that would take the live total beyond `bytes`.
pub fn set_limit(bytes: usize) {
    LIMIT.store(bytes, Ordering::Relaxed);
}
