//! The allocator's own accounting, and handing freed pages back to the system while the server
//! is idle. The binary allocates with jemalloc (`main.rs`); this module reads it through its
//! control interface and never assumes it: in a program that allocates with something else
//! (the test binaries) `installed()` is false, nothing is read and nothing is purged.
//!
//! Why purge: jemalloc keeps pages freed by the last requests ("dirty" pages) for reuse and
//! returns them gradually over its decay time, but in the mixed load 4 to 11 MiB of them were
//! still resident after 12 quiet seconds, so the resident set of an idle server wandered by
//! -30% to +38% around the same held data. Purging them when no computation is running makes
//! the idle resident set follow what the server holds.

use std::sync::OnceLock;

use tikv_jemalloc_ctl::{epoch, raw, stats};

/// Bytes as the allocator counts them, read at one epoch.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub struct AllocatorStats {
    /// Bytes the program has allocated and not freed.
    pub allocated: u64,
    /// Bytes of the pages holding those allocations (allocated plus their slack).
    pub active: u64,
    /// Bytes resident in memory that the allocator maps: active pages, its metadata and freed
    /// pages not yet handed back.
    pub resident: u64,
    /// Bytes of freed pages kept for reuse and not yet handed back (resident until purged).
    pub dirty: u64,
}

/// Purges all arenas at once (jemalloc's `MALLCTL_ARENAS_ALL`).
const PURGE_ALL: &[u8] = b"arena.4096.purge\0";
const DIRTY_PAGES: &[u8] = b"stats.arenas.4096.pdirty\0";
const PAGE_SIZE: &[u8] = b"arenas.page\0";
const THREAD_ALLOCATED: &[u8] = b"thread.allocated\0";

/// Whether jemalloc is the program's allocator: a 1 MiB allocation must show in the count of
/// bytes this thread has allocated (a per-thread count, so other threads cannot disturb it).
/// Decided once.
pub fn installed() -> bool {
    static INSTALLED: OnceLock<bool> = OnceLock::new();
    *INSTALLED.get_or_init(|| {
        const PROBE: usize = 1 << 20;
        let before = thread_allocated();
        let probe = std::hint::black_box(vec![0u8; PROBE]);
        let during = thread_allocated();
        drop(probe);
        matches!((before, during), (Some(b), Some(d)) if d >= b + PROBE as u64)
    })
}

fn thread_allocated() -> Option<u64> {
    // SAFETY: `thread.allocated` is a uint64_t statistic.
    unsafe { raw::read::<u64>(THREAD_ALLOCATED) }.ok()
}

/// The allocator's figures now, or `None` when jemalloc is not the program's allocator.
pub fn stats() -> Option<AllocatorStats> {
    if !installed() {
        return None;
    }
    epoch::advance().ok()?;
    // SAFETY: both names are jemalloc statistics of type size_t, read as usize.
    let (pages, page) = unsafe {
        (
            raw::read::<usize>(DIRTY_PAGES).ok()?,
            raw::read::<usize>(PAGE_SIZE).ok()?,
        )
    };
    Some(AllocatorStats {
        allocated: stats::allocated::read().ok()? as u64,
        active: stats::active::read().ok()? as u64,
        resident: stats::resident::read().ok()? as u64,
        dirty: (pages as u64).saturating_mul(page as u64),
    })
}

/// Hands every freed page the allocator keeps back to the system. Cheap (one madvise per run of
/// freed pages) and safe while other threads allocate; the next allocations fault their pages
/// in again, so it is worth doing only when the server is idle. Returns whether it ran.
pub fn release_freed() -> bool {
    if !installed() {
        return false;
    }
    // SAFETY: a NUL-terminated name; `arena.<i>.purge` reads and writes no value, so every
    // pointer is null and the length zero, as jemalloc's manual prescribes.
    let code = unsafe {
        tikv_jemalloc_sys::mallctl(
            PURGE_ALL.as_ptr().cast(),
            std::ptr::null_mut(),
            std::ptr::null_mut(),
            std::ptr::null_mut(),
            0,
        )
    };
    code == 0
}
