//! Large pixel buffers. A 24-megapixel frame touches tens of thousands of 4 KiB pages;
//! when several threads fault them in at once they queue on the kernel's memory-map lock,
//! which made a parallel pass slower than a serial one. Asking for transparent huge pages
//! (where the kernel allows them on request) removes almost all of those faults.

/// A zero-filled vector of `n` elements backed, where possible, by huge pages.
pub fn zeroed<T: Copy + Default>(n: usize) -> Vec<T> {
    let mut v: Vec<T> = Vec::with_capacity(n);
    advise_huge_pages(v.as_mut_ptr() as *mut u8, n * std::mem::size_of::<T>());
    v.resize(n, T::default());
    v
}

/// Fallible version for sizes that come from a file: `None` when the memory is not there.
pub fn try_zeroed<T: Copy + Default>(n: usize) -> Option<Vec<T>> {
    let mut v: Vec<T> = Vec::new();
    v.try_reserve_exact(n).ok()?;
    advise_huge_pages(v.as_mut_ptr() as *mut u8, n * std::mem::size_of::<T>());
    v.resize(n, T::default());
    Some(v)
}

#[cfg(target_os = "linux")]
fn advise_huge_pages(ptr: *mut u8, len: usize) {
    const HUGE: usize = 2 << 20;
    if len < 4 * HUGE {
        return;
    }
    // Only whole huge pages inside the allocation are advised.
    let start = (ptr as usize).div_ceil(HUGE) * HUGE;
    let end = (ptr as usize + len) / HUGE * HUGE;
    if end > start {
        // SAFETY: the range lies inside an allocation we own; MADV_HUGEPAGE is advice
        // only and never changes the contents. Failure (kernel without THP) is ignored.
        unsafe {
            libc::madvise(start as *mut libc::c_void, end - start, libc::MADV_HUGEPAGE);
        }
    }
}

#[cfg(not(target_os = "linux"))]
fn advise_huge_pages(_ptr: *mut u8, _len: usize) {}
