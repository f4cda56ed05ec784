//! [`Lines`]: a packed weight's values, starting on a 64-byte boundary.
//!
//! A panel row of every format is a whole number of 64-byte lines from the start of its values
//! (16 f32 or bf16 pairs, 64 int8 values over four inputs), so with the values aligned each
//! AVX-512 load and each 64-byte tile row reads one cache line. A `Vec` of large size is only
//! 16-byte aligned (the system allocator puts a 16-byte header before a fresh mapping), which
//! made every tile row of a bf16 weight straddle two lines: the tile unit ran at 420-480 GFLOP/s
//! instead of 720-970 on one thread (encoder shapes, `tmp` measurement of 2026-12-05, the 2-vCPU
//! Xeon with AMX).
#![allow(unsafe_code)]

use std::alloc::{Layout, alloc_zeroed, dealloc, handle_alloc_error};
use std::marker::PhantomData;
use std::ptr::NonNull;

/// The boundary the values start on: one cache line.
pub(crate) const LINE: usize = 64;

/// A number type that any bit pattern (and all zeros) makes a valid value of.
///
/// # Safety
/// Implemented only for plain number types of alignment at most [`LINE`].
pub(crate) unsafe trait Plain: Copy + Send + Sync + 'static {}
// SAFETY: plain numbers; every bit pattern is a value.
unsafe impl Plain for f32 {}
// SAFETY: as above.
unsafe impl Plain for u32 {}
// SAFETY: as above.
unsafe impl Plain for u16 {}
// SAFETY: as above.
unsafe impl Plain for u8 {}
// SAFETY: as above.
unsafe impl Plain for i8 {}

/// `len` values of `T`, zeroed when made, the first on a [`LINE`] boundary; derefs to `[T]`.
pub(crate) struct Lines<T: Plain> {
    ptr: NonNull<T>,
    len: usize,
    _owns: PhantomData<T>,
}

// SAFETY: Lines owns its values like a Vec does.
unsafe impl<T: Plain> Send for Lines<T> {}
// SAFETY: as above.
unsafe impl<T: Plain> Sync for Lines<T> {}

impl<T: Plain> Lines<T> {
    /// No values (nothing allocated).
    pub(crate) fn new() -> Self {
        Self {
            ptr: NonNull::dangling(),
            len: 0,
            _owns: PhantomData,
        }
    }

    /// `len` zeros. Asked of the allocator as zeroed memory, so a fresh large buffer is not
    /// written twice (the operating system's pages are zero already).
    pub(crate) fn zeroed(len: usize) -> Self {
        let Some(layout) = Self::layout(len) else {
            return Self::new();
        };
        // SAFETY: the layout has a non-zero size (checked by `layout`).
        let raw = unsafe { alloc_zeroed(layout) };
        let Some(ptr) = NonNull::new(raw.cast::<T>()) else {
            handle_alloc_error(layout)
        };
        Self {
            ptr,
            len,
            _owns: PhantomData,
        }
    }

    fn layout(len: usize) -> Option<Layout> {
        let bytes = len
            .checked_mul(size_of::<T>())
            .expect("weight size overflows");
        (bytes > 0).then(|| Layout::from_size_align(bytes, LINE).expect("weight size overflows"))
    }
}

impl<T: Plain> Drop for Lines<T> {
    fn drop(&mut self) {
        if let Some(layout) = Self::layout(self.len) {
            // SAFETY: allocated in `zeroed` with this layout.
            unsafe { dealloc(self.ptr.as_ptr().cast(), layout) }
        }
    }
}

impl<T: Plain> Clone for Lines<T> {
    fn clone(&self) -> Self {
        let mut copy = Self::zeroed(self.len);
        copy.copy_from_slice(self);
        copy
    }
}

impl<T: Plain> std::ops::Deref for Lines<T> {
    type Target = [T];
    fn deref(&self) -> &[T] {
        // SAFETY: `len` values, initialised (zeroed, then only written through `&mut [T]`).
        unsafe { std::slice::from_raw_parts(self.ptr.as_ptr(), self.len) }
    }
}

impl<T: Plain> std::ops::DerefMut for Lines<T> {
    fn deref_mut(&mut self) -> &mut [T] {
        // SAFETY: as in `deref`, and `&mut self` makes the borrow unique.
        unsafe { std::slice::from_raw_parts_mut(self.ptr.as_ptr(), self.len) }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn values_start_on_a_line_and_come_zeroed() {
        for len in [1usize, 3, 17, 1000, 300_000] {
            let mut a = Lines::<f32>::zeroed(len);
            assert_eq!(a.as_ptr() as usize % LINE, 0, "{len} f32");
            assert!(a.iter().all(|&v| v == 0.0));
            a[len - 1] = 2.5;
            let b = a.clone();
            assert_eq!(b.as_ptr() as usize % LINE, 0);
            assert_eq!(b[len - 1], 2.5);
            let q = Lines::<i8>::zeroed(len);
            assert_eq!(q.as_ptr() as usize % LINE, 0, "{len} i8");
        }
        assert!(Lines::<u32>::zeroed(0).is_empty());
        assert!(Lines::<u8>::new().is_empty());
    }
}
