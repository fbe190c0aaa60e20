//! The process's memory allocator: large arrays in mappings of their own, backed by 2 MiB pages.
//!
//! A unit's arrays are tens to hundreds of MiB, allocated once and filled once. With the system
//! allocator every one of them is a fresh mapping of 4 KiB pages, and profiles of a rerun that
//! reads cached arrays showed most of its time in the kernel: a page fault (and, on writes to a
//! zero page, a TLB shootdown across cores) per 4 KiB. [`LargePages`] gives each allocation of
//! [`LARGE`] bytes or more its own anonymous mapping, aligned to 2 MiB and advised as a candidate
//! for transparent huge pages (`MADV_HUGEPAGE`), so a 124 MiB array faults in 62 times instead
//! of 31,744. Smaller allocations, other alignments and other systems go to [`System`]
//! unchanged. Where the kernel declines huge pages (`transparent_hugepage` set to `never`) the
//! mapping simply stays in 4 KiB pages: the advice changes speed, never results.
//!
//! A fresh anonymous mapping reads as zeros, so zeroed allocations cost nothing extra; growing
//! one uses `mremap`, which moves page tables instead of copying bytes.
//!
//! Freed mappings are kept in a small pool (at most [`POOL_BYTES`] in all) and handed to the
//! next large allocation of a size it serves (see [`Pool::take`] and [`Pool::keep`]), cut or
//! grown to that size: a chain allocates arrays of the same few
//! sizes over and over (one per part, per subject), and a page the process already holds costs
//! nothing to reuse, where a fresh one must be faulted in and cleared by the kernel — on a
//! virtual machine, the first touch of guest memory was measured at 0.38 GB/s against 15 GB/s
//! for memory touched before. The pool is small because what it holds counts in the process's
//! resident memory.

use std::alloc::{GlobalAlloc, Layout, System};

/// Allocations of at least this many bytes get a mapping of their own.
pub const LARGE: usize = 4 << 20;

#[cfg(target_os = "linux")]
const HUGE_PAGE: usize = 2 << 20;

/// The most bytes of freed mappings kept for reuse.
pub const POOL_BYTES: usize = 256 << 20;

/// Freed mappings (address, mapped length), at most [`SLOTS`] of them.
#[cfg(target_os = "linux")]
struct Pool {
    slots: [(usize, usize); SLOTS],
    count: usize,
    bytes: usize,
}

#[cfg(target_os = "linux")]
const SLOTS: usize = 8;

#[cfg(target_os = "linux")]
static POOL: std::sync::Mutex<Pool> = std::sync::Mutex::new(Pool {
    slots: [(0, 0); SLOTS],
    count: 0,
    bytes: 0,
});

/// Mappings given back by [`Pool::keep`], to be unmapped.
#[cfg(target_os = "linux")]
struct Released {
    slots: [(usize, usize); SLOTS + 1],
    count: usize,
}

#[cfg(target_os = "linux")]
impl Released {
    fn push(&mut self, slot: (usize, usize)) {
        self.slots[self.count] = slot;
        self.count += 1;
    }
}

#[cfg(target_os = "linux")]
impl Pool {
    /// The freed mapping that best serves `len` bytes: the smallest at least that long but not
    /// more than twice as long; else the longest one shorter than `len` (grown to fit); else
    /// none. A mapping much longer than asked for is left for a later, larger request: cutting
    /// it down would give its pages back and make that request clear fresh ones (a chain asks
    /// for a few sizes over and over, e.g. a 120 MiB load and a 20 MiB reduction per subject).
    fn take(&mut self, len: usize) -> Option<(usize, usize)> {
        let held = &self.slots[..self.count];
        let fit = (0..held.len())
            .filter(|&i| held[i].1 >= len && held[i].1 / 2 <= len)
            .min_by_key(|&i| held[i].1);
        let shorter = || {
            (0..held.len())
                .filter(|&i| held[i].1 < len)
                .max_by_key(|&i| held[i].1)
        };
        let i = fit.or_else(shorter)?;
        let slot = self.slots[i];
        self.count -= 1;
        self.slots[i] = self.slots[self.count];
        self.bytes -= slot.1;
        Some(slot)
    }

    /// Keep a freed mapping. Where the pool has no room for it, shorter mappings are given back
    /// (shortest first) to make room, since a longer one saves more clearing when reused; a
    /// mapping that still does not fit is given back itself. Returns what to unmap.
    fn keep(&mut self, slot: (usize, usize)) -> Released {
        let mut released = Released {
            slots: [(0, 0); SLOTS + 1],
            count: 0,
        };
        if slot.1 > POOL_BYTES {
            released.push(slot);
            return released;
        }
        while self.count == SLOTS || self.bytes + slot.1 > POOL_BYTES {
            let shortest = (0..self.count)
                .filter(|&i| self.slots[i].1 < slot.1)
                .min_by_key(|&i| self.slots[i].1);
            let Some(i) = shortest else {
                released.push(slot);
                return released;
            };
            released.push(self.slots[i]);
            self.bytes -= self.slots[i].1;
            self.count -= 1;
            self.slots[i] = self.slots[self.count];
        }
        self.slots[self.count] = slot;
        self.count += 1;
        self.bytes += slot.1;
        released
    }
}

/// A mapping of `mapped_len(size)` bytes from the pool (its first `kept` bytes hold old
/// contents, the rest zeros), or `None`.
#[cfg(target_os = "linux")]
unsafe fn reuse(size: usize) -> Option<(*mut u8, usize)> {
    let len = mapped_len(size);
    let (ptr, held) = POOL.lock().ok()?.take(len)?;
    if held > len {
        libc::munmap((ptr + len) as *mut libc::c_void, held - len);
        return Some((ptr as *mut u8, len));
    }
    if held == len {
        return Some((ptr as *mut u8, len));
    }
    let grown = libc::mremap(ptr as *mut libc::c_void, held, len, libc::MREMAP_MAYMOVE);
    if grown == libc::MAP_FAILED {
        libc::munmap(ptr as *mut libc::c_void, held);
        return None;
    }
    Some((grown as *mut u8, held))
}

/// The allocator: see the module documentation.
pub struct LargePages;

#[cfg(target_os = "linux")]
fn ours(layout: Layout) -> bool {
    layout.size() >= LARGE && layout.align() <= HUGE_PAGE
}

/// The length of the mapping that holds `size` bytes: whole huge pages.
#[cfg(target_os = "linux")]
fn mapped_len(size: usize) -> usize {
    size.div_ceil(HUGE_PAGE) * HUGE_PAGE
}

/// A fresh zeroed mapping of `mapped_len(size)` bytes starting on a huge-page boundary, or null.
#[cfg(target_os = "linux")]
unsafe fn map(size: usize) -> *mut u8 {
    let len = mapped_len(size);
    // Map one huge page more than needed, then unmap the unaligned head and the tail.
    let Some(padded) = len.checked_add(HUGE_PAGE) else {
        return std::ptr::null_mut();
    };
    let raw = libc::mmap(
        std::ptr::null_mut(),
        padded,
        libc::PROT_READ | libc::PROT_WRITE,
        libc::MAP_PRIVATE | libc::MAP_ANONYMOUS,
        -1,
        0,
    );
    if raw == libc::MAP_FAILED {
        return std::ptr::null_mut();
    }
    let start = raw as usize;
    let aligned = start.next_multiple_of(HUGE_PAGE);
    let head = aligned - start;
    let tail = padded - head - len;
    if head > 0 {
        libc::munmap(raw, head);
    }
    if tail > 0 {
        libc::munmap((aligned + len) as *mut libc::c_void, tail);
    }
    // Advice only: a kernel that refuses it leaves ordinary pages.
    libc::madvise(aligned as *mut libc::c_void, len, libc::MADV_HUGEPAGE);
    aligned as *mut u8
}

#[cfg(target_os = "linux")]
unsafe impl GlobalAlloc for LargePages {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        if !ours(layout) {
            return System.alloc(layout);
        }
        match reuse(layout.size()) {
            Some((ptr, _)) => ptr,
            None => map(layout.size()),
        }
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        if !ours(layout) {
            return System.alloc_zeroed(layout);
        }
        match reuse(layout.size()) {
            Some((ptr, kept)) => {
                std::ptr::write_bytes(ptr, 0, kept.min(layout.size()));
                ptr
            }
            None => map(layout.size()), // anonymous mappings read as zeros
        }
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        if !ours(layout) {
            return System.dealloc(ptr, layout);
        }
        let slot = (ptr as usize, mapped_len(layout.size()));
        let released = match POOL.lock() {
            Ok(mut pool) => pool.keep(slot),
            Err(_) => {
                libc::munmap(ptr as *mut libc::c_void, slot.1);
                return;
            }
        };
        for &(ptr, len) in &released.slots[..released.count] {
            libc::munmap(ptr as *mut libc::c_void, len);
        }
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        let Ok(new_layout) = Layout::from_size_align(new_size, layout.align()) else {
            return std::ptr::null_mut();
        };
        match (ours(layout), ours(new_layout)) {
            (false, false) => System.realloc(ptr, layout, new_size),
            (true, true) => {
                let (old_len, new_len) = (mapped_len(layout.size()), mapped_len(new_size));
                if old_len == new_len {
                    return ptr;
                }
                let moved = libc::mremap(
                    ptr as *mut libc::c_void,
                    old_len,
                    new_len,
                    libc::MREMAP_MAYMOVE,
                );
                if moved == libc::MAP_FAILED {
                    return std::ptr::null_mut();
                }
                // The page-table move keeps the advice, but a moved mapping may start off a
                // huge-page boundary; it is still correct, only some of it in small pages.
                moved as *mut u8
            }
            _ => {
                let fresh = self.alloc(new_layout);
                if !fresh.is_null() {
                    std::ptr::copy_nonoverlapping(ptr, fresh, layout.size().min(new_size));
                    self.dealloc(ptr, layout);
                }
                fresh
            }
        }
    }
}

#[cfg(not(target_os = "linux"))]
unsafe impl GlobalAlloc for LargePages {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        System.alloc(layout)
    }

    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        System.alloc_zeroed(layout)
    }

    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        System.dealloc(ptr, layout)
    }

    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        System.realloc(ptr, layout, new_size)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // The test binary uses the system allocator; these call `LargePages` directly.

    #[test]
    fn large_blocks_are_zeroed_aligned_writable_and_grow_keeping_their_bytes() {
        let a = LargePages;
        let layout = Layout::from_size_align(LARGE + 12_345, 64).unwrap();
        unsafe {
            let p = a.alloc_zeroed(layout);
            assert!(!p.is_null());
            assert_eq!(p as usize % 64, 0);
            let bytes = std::slice::from_raw_parts_mut(p, layout.size());
            assert!(bytes.iter().all(|&b| b == 0));
            for (i, b) in bytes.iter_mut().enumerate() {
                *b = (i % 251) as u8;
            }
            // Grow across several huge pages, then shrink below the threshold.
            let grown = a.realloc(p, layout, 3 * LARGE + 7);
            assert!(!grown.is_null());
            let kept = std::slice::from_raw_parts(grown, layout.size());
            assert!(kept.iter().enumerate().all(|(i, &b)| b == (i % 251) as u8));
            let big = Layout::from_size_align(3 * LARGE + 7, 64).unwrap();
            let small = a.realloc(grown, big, 1000);
            assert!(!small.is_null());
            let kept = std::slice::from_raw_parts(small, 1000);
            assert!(kept.iter().enumerate().all(|(i, &b)| b == (i % 251) as u8));
            a.dealloc(small, Layout::from_size_align(1000, 64).unwrap());
        }
    }

    #[test]
    fn a_reused_block_is_zeroed_when_asked_and_keeps_its_size() {
        let a = LargePages;
        let layout = Layout::from_size_align(LARGE + 3 * 4096, 8).unwrap();
        for round in 0..4 {
            unsafe {
                let p = a.alloc(layout);
                assert!(!p.is_null());
                std::ptr::write_bytes(p, 0xab, layout.size());
                a.dealloc(p, layout);
                // The next block of this or another size may be the one just freed.
                let bigger = Layout::from_size_align(layout.size() * (1 + round), 8).unwrap();
                let q = a.alloc_zeroed(bigger);
                assert!(!q.is_null());
                let bytes = std::slice::from_raw_parts_mut(q, bigger.size());
                assert!(bytes.iter().all(|&b| b == 0), "round {round}");
                bytes.fill(1); // all of it is writable
                a.dealloc(q, bigger);
            }
        }
    }

    #[test]
    fn small_blocks_round_trip_through_the_system_allocator() {
        let a = LargePages;
        let layout = Layout::from_size_align(100, 8).unwrap();
        unsafe {
            let p = a.alloc(layout);
            assert!(!p.is_null());
            std::ptr::write_bytes(p, 7, 100);
            let grown = a.realloc(p, layout, LARGE * 2);
            assert!(!grown.is_null());
            assert!(std::slice::from_raw_parts(grown, 100)
                .iter()
                .all(|&b| b == 7));
            a.dealloc(grown, Layout::from_size_align(LARGE * 2, 8).unwrap());
        }
    }

    /// The pool's choices, on made-up addresses (nothing is mapped): a chain that loads a
    /// 120 MiB array and reduces it into a 20 MiB one per subject, two subjects at a time,
    /// must find its 120 MiB mappings again instead of cutting them down for the 20 MiB ones.
    #[cfg(target_os = "linux")]
    #[test]
    fn the_pool_keeps_long_mappings_for_long_requests() {
        const MIB: usize = 1 << 20;
        let mut pool = Pool {
            slots: [(0, 0); SLOTS],
            count: 0,
            bytes: 0,
        };
        let unmapped =
            |r: Released| -> Vec<usize> { r.slots[..r.count].iter().map(|s| s.1 / MIB).collect() };
        assert!(unmapped(pool.keep((1, 20 * MIB))).is_empty());
        assert!(unmapped(pool.keep((2, 20 * MIB))).is_empty());
        assert!(unmapped(pool.keep((3, 120 * MIB))).is_empty());
        // 160 + 120 > 256 MiB: both 20 MiB mappings make room for the second long one.
        assert_eq!(unmapped(pool.keep((4, 120 * MIB))), vec![20, 20]);
        assert_eq!(pool.bytes, 240 * MIB);
        // No room, and nothing shorter to give back: a short one is refused.
        assert_eq!(unmapped(pool.keep((5, 20 * MIB))), vec![20]);
        // A 20 MiB request does not cut a 120 MiB mapping down...
        assert_eq!(pool.take(20 * MIB), None);
        // ...which serves the next 120 MiB request whole, and a 100 MiB one too.
        assert_eq!(pool.take(120 * MIB).map(|s| s.1), Some(120 * MIB));
        assert_eq!(pool.take(100 * MIB).map(|s| s.1), Some(120 * MIB));
        assert_eq!((pool.count, pool.bytes), (0, 0));
        // Nothing long enough: the longest shorter one is grown.
        pool.keep((6, 8 * MIB));
        pool.keep((7, 16 * MIB));
        assert_eq!(pool.take(40 * MIB), Some((7, 16 * MIB)));
        // Larger than the whole pool: given back at once.
        assert_eq!(unmapped(pool.keep((8, 300 * MIB))), vec![300]);
    }
}
