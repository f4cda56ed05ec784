//! What the fuzz targets share.
//!
//! libFuzzer catches panics, aborts, timeouts (`-timeout`) and a growing resident set
//! (`-rss_limit_mb`), but its per-allocation limit (`-malloc_limit_mb`) needs the sanitizer
//! runtime's malloc hooks, which a stable toolchain does not build (no `-Zsanitizer`). So every
//! target links [`CappedAllocator`]: one allocation over [`MAX_ALLOCATION`] aborts the process,
//! which libFuzzer reports as a crash with the input that caused it. An input of a few kilobytes
//! that asks for hundreds of megabytes is an unbounded allocation, whatever the code does next.

use std::alloc::{GlobalAlloc, Layout, System};
use std::io::Write;

/// The largest single allocation a target may make. Inputs are at most 64 KiB (`-max_len`), so
/// nothing honest comes near it.
pub const MAX_ALLOCATION: usize = 256 << 20;

/// The system allocator, with the size check above.
pub struct CappedAllocator;

fn check(size: usize) {
    if size > MAX_ALLOCATION {
        // No formatting here: this runs inside the allocator.
        let _ = std::io::stderr().write_all(
            b"switchyard-fuzz: a single allocation over 256 MiB (unbounded allocation)\n",
        );
        std::process::abort();
    }
}

// SAFETY: every method forwards to `System` with the caller's arguments unchanged; the only
// addition is a size check that aborts before anything is allocated.
unsafe impl GlobalAlloc for CappedAllocator {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        check(layout.size());
        // SAFETY: forwarded as is; the caller upholds `GlobalAlloc::alloc`'s contract.
        unsafe { System.alloc(layout) }
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        check(layout.size());
        // SAFETY: as in `alloc`.
        unsafe { System.alloc_zeroed(layout) }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: `ptr` came from `System` through this allocator, with this layout.
        unsafe { System.dealloc(ptr, layout) }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        check(new_size);
        // SAFETY: as in `dealloc`; the caller upholds `GlobalAlloc::realloc`'s contract.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
}

#[global_allocator]
static ALLOCATOR: CappedAllocator = CappedAllocator;

/// Splits a fuzz input at the first line that is exactly `marker`: the text before it and the
/// lines after it. Inputs that are not UTF-8 give `None`. Seeds stay readable files this way
/// (a TOML file, then its environment; a path, then its body).
pub fn split_at_line<'a>(text: &'a str, marker: &str) -> (&'a str, Option<&'a str>) {
    let mut offset = 0;
    for line in text.split_inclusive('\n') {
        if line.trim_end_matches(['\n', '\r']) == marker {
            return (&text[..offset], Some(&text[offset + line.len()..]));
        }
        offset += line.len();
    }
    (text, None)
}
