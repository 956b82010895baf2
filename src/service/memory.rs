//! Handing the memory of a replaced model back to the operating system,
//! and keeping the memory of scoring batches rather than handing it back.
//!
//! A swapped-out model is freed once the last call that started on it
//! ends, but glibc's allocator keeps freed pages in its arenas, so every
//! reload would ratchet the resident size up by about a model's worth and
//! the container's memory graph could not tell that from a leak.
//! `malloc_trim(0)` returns the free pages of every arena. It runs a moment
//! after the swap (calls on the old model are usually done by then) on the
//! blocking pool, since it walks the whole heap.

use std::time::Duration;

/// Freed memory an arena keeps at its top before giving it back, and the
/// allocation size from which glibc maps fresh pages instead of using an
/// arena (32 MiB is its largest).
const KEEP_FREED: usize = 64 << 20;
const MAP_FROM: usize = 32 << 20;

/// Sets the allocator up for serving. A batch allocates and frees a few
/// megabytes (standardised rows, PCA scores, kernel rows, responses) on
/// the worker threads, whose glibc arenas give any free top beyond 128 KiB
/// back to the kernel at once (`madvise`), so the next batch page-faults
/// the same memory in again, zeroed: about 5% of the server's CPU time on
/// the serving benchmark's ridge batches (`perf`, 2026-12-02). Keeping up
/// to [`KEEP_FREED`] per arena stops that churn; the resident size then
/// sits at the working set's peak instead of swinging below it. The trim
/// after a model swap ([`release_after_swap`]) still returns everything
/// free. The settings are the whole process's and apply to arenas made
/// before and after; the server sets them as it starts, after logging is
/// up, so a refusal is seen.
pub fn keep_batch_memory() {
    #[cfg(all(target_os = "linux", target_env = "gnu"))]
    {
        let (keep, map) = (KEEP_FREED as libc::c_int, MAP_FROM as libc::c_int);
        // SAFETY: mallopt takes plain integers and only sets the
        // allocator's parameters under its own lock.
        let ok = unsafe {
            libc::mallopt(libc::M_TRIM_THRESHOLD, keep) == 1
                && libc::mallopt(libc::M_MMAP_THRESHOLD, map) == 1
        };
        if !ok {
            tracing::warn!(
                "the allocator refused its serving settings; batches will page-fault more"
            );
        }
    }
}

/// Long enough for calls that started on the old model to finish.
const AFTER_SWAP: Duration = Duration::from_secs(2);

/// Schedules the trim; call from inside the runtime.
pub fn release_after_swap() {
    tokio::spawn(async {
        tokio::time::sleep(AFTER_SWAP).await;
        let _ = tokio::task::spawn_blocking(trim).await;
    });
}

#[cfg(all(target_os = "linux", target_env = "gnu"))]
fn trim() {
    // SAFETY: malloc_trim takes no pointers and only touches the
    // allocator's own state under its own locks; any thread may call it.
    let released = unsafe { libc::malloc_trim(0) };
    tracing::debug!(
        released = released != 0,
        "freed memory returned after a model swap"
    );
}

#[cfg(not(all(target_os = "linux", target_env = "gnu")))]
fn trim() {}
