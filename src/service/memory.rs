//! Handing the memory of a replaced model back to the operating system.
//!
//! A swapped-out model is freed once the last call that started on it
//! ends, but glibc's allocator keeps freed pages in its arenas, so every
//! reload would ratchet the resident size up by about a model's worth and
//! the container's memory graph could not tell that from a leak.
//! `malloc_trim(0)` returns the free pages of every arena. It runs a moment
//! after the swap (calls on the old model are usually done by then) on the
//! blocking pool, since it walks the whole heap.

use std::time::Duration;

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
