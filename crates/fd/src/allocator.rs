//! A process setting for programs that run a check: see [`keep_freed_memory`].

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
