//! Process settings for programs that run a check or a large pass: see [`keep_freed_memory`]
//! and [`LargeBlocksOnHugePages`].

use std::alloc::{GlobalAlloc, Layout, System};

/// Keeps freed memory in the process for reuse. A check evaluates the loss thousands of times,
/// each pass allocating and freeing the same few hundred kilobytes of layer outputs. glibc's malloc hands freed memory at the top of the
/// heap back to the kernel past 128 KiB and serves large blocks by mmap, so every pass faulted its
/// pages in again (a quarter of a small CNN's check time). Keeping up to 256 MiB of freed memory
/// for reuse costs nothing a run would not have touched anyway. Call it first thing in `main`
/// (the `plumb` binary and the benchmarks do); elsewhere than Linux with glibc it does nothing.
#[cfg(all(target_os = "linux", target_env = "gnu"))]
pub fn keep_freed_memory() {
    const KEEP: libc::c_int = 256 << 20;
    // SAFETY: mallopt only sets two of the allocator's thresholds; called before any thread starts.
    unsafe {
        libc::mallopt(libc::M_TRIM_THRESHOLD, KEEP);
        libc::mallopt(libc::M_MMAP_THRESHOLD, 32 << 20);
    }
}

#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
pub fn keep_freed_memory() {}

/// The system allocator, with blocks of [`HUGE_PAGE_BLOCK`] bytes or more offered to the kernel
/// for transparent huge pages (`madvise(MADV_HUGEPAGE)`), as NumPy does for its arrays of 4 MiB
/// or more. A pass over a large batch writes its layer outputs into fresh memory: at a batch of
/// 8,192, `plumb grad` took 33,000 page faults of 4 KiB, 40% of its time in the kernel; a 2 MiB
/// page is one fault. Only the whole 2 MiB pages inside a block are advised, before anything is
/// written there. Where the kernel's setting is `never` the advice changes nothing, and
/// elsewhere than Linux there is none; a refused advice is ignored (the memory is the same).
pub struct LargeBlocksOnHugePages;

/// The smallest block advised (NumPy's threshold for its arrays).
pub const HUGE_PAGE_BLOCK: usize = 4 << 20;

impl LargeBlocksOnHugePages {
    #[cfg(target_os = "linux")]
    fn advise(block: *mut u8, size: usize) {
        const HUGE: usize = 2 << 20;
        if block.is_null() || size < HUGE_PAGE_BLOCK {
            return;
        }
        let start = (block as usize).next_multiple_of(HUGE);
        let end = (block as usize + size) / HUGE * HUGE;
        if end > start {
            // SAFETY: [start, end) lies inside the block just allocated, which this process
            // owns; the advice changes how pages are backed, never their contents.
            unsafe {
                libc::madvise(start as *mut libc::c_void, end - start, libc::MADV_HUGEPAGE);
            }
        }
    }

    #[cfg(not(target_os = "linux"))]
    fn advise(_: *mut u8, _: usize) {}
}

// SAFETY: every call is the system allocator's own, with the same layout; the advice touches no
// byte of any block.
unsafe impl GlobalAlloc for LargeBlocksOnHugePages {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        // SAFETY: the caller's contract for `alloc`, handed on.
        let block = unsafe { System.alloc(layout) };
        Self::advise(block, layout.size());
        block
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        // SAFETY: as `alloc`. A large zeroed block comes from fresh mappings the kernel zeroes,
        // untouched until written, so advising after the call still counts.
        let block = unsafe { System.alloc_zeroed(layout) };
        Self::advise(block, layout.size());
        block
    }

    unsafe fn dealloc(&self, block: *mut u8, layout: Layout) {
        // SAFETY: the caller's contract for `dealloc`, handed on.
        unsafe { System.dealloc(block, layout) }
    }

    unsafe fn realloc(&self, block: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        // SAFETY: the caller's contract for `realloc`, handed on.
        let moved = unsafe { System.realloc(block, layout, new_size) };
        Self::advise(moved, new_size);
        moved
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Blocks above and below the threshold keep what is written to them, come zeroed when
    /// asked, and keep their contents when grown (the allocator only hands calls on).
    #[test]
    fn blocks_hold_their_values_through_growth() {
        let a = LargeBlocksOnHugePages;
        for size in [
            64,
            HUGE_PAGE_BLOCK - 8,
            HUGE_PAGE_BLOCK,
            3 * HUGE_PAGE_BLOCK + 4096,
        ] {
            let layout = Layout::from_size_align(size, 8).unwrap();
            // SAFETY: non-zero sizes, each block freed once with its own layout.
            unsafe {
                let zeroed = a.alloc_zeroed(layout);
                assert!(!zeroed.is_null());
                let bytes = std::slice::from_raw_parts(zeroed, size);
                assert!(bytes.iter().all(|&b| b == 0), "size {size}");
                a.dealloc(zeroed, layout);

                let block = a.alloc(layout);
                assert!(!block.is_null());
                for i in (0..size).step_by(4093) {
                    *block.add(i) = (i % 251) as u8;
                }
                let grown = a.realloc(block, layout, 2 * size);
                assert!(!grown.is_null());
                for i in (0..size).step_by(4093) {
                    assert_eq!(*grown.add(i), (i % 251) as u8, "size {size}, byte {i}");
                }
                a.dealloc(grown, Layout::from_size_align(2 * size, 8).unwrap());
            }
        }
    }

    /// The advice reaches the kernel: the mapping that holds a large block's whole 2 MiB pages
    /// carries the huge-page flag (`hg` in /proc/self/smaps, proc(5)). Skipped where the kernel
    /// has no transparent huge pages.
    #[cfg(target_os = "linux")]
    #[test]
    fn a_large_block_is_advised() {
        if !std::path::Path::new("/sys/kernel/mm/transparent_hugepage").exists() {
            return;
        }
        let a = LargeBlocksOnHugePages;
        let layout = Layout::from_size_align(3 * HUGE_PAGE_BLOCK, 8).unwrap();
        // SAFETY: a non-zero size, freed once with its layout.
        let block = unsafe { a.alloc(layout) };
        assert!(!block.is_null());
        let inside = (block as usize).next_multiple_of(2 << 20);
        let smaps = std::fs::read_to_string("/proc/self/smaps").unwrap();
        let mut flags = None;
        let mut holds = false;
        for line in smaps.lines() {
            let range = line
                .split_whitespace()
                .next()
                .and_then(|r| r.split_once('-'));
            if let Some((from, to)) = range
                && let (Ok(from), Ok(to)) = (
                    usize::from_str_radix(from, 16),
                    usize::from_str_radix(to, 16),
                )
            {
                holds = (from..to).contains(&inside);
            } else if holds && let Some(f) = line.strip_prefix("VmFlags:") {
                flags = Some(f.to_string());
            }
        }
        // SAFETY: the block allocated above, with its layout.
        unsafe { a.dealloc(block, layout) };
        let flags = flags.expect("the block's mapping is listed");
        assert!(
            flags.split_whitespace().any(|f| f == "hg"),
            "VmFlags:{flags}"
        );
    }
}
