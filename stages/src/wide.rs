//! Loops compiled twice: once for any x86-64 CPU, once for AVX2, the second chosen at run time.

/// Run `work` compiled for AVX2 when the CPU has it (checked at run time), and as it is
/// otherwise. For loops of exactly rounded IEEE operations in a fixed order: Rust never fuses a
/// multiply and an add on its own, so the wider build gives the same bits, only sooner.
///
/// `work` must be an `#[inline(always)]` closure around `#[inline(always)]` code: only code
/// inlined into the AVX2 function is compiled for AVX2.
#[inline(always)]
pub fn with_avx2<R>(work: impl FnOnce() -> R) -> R {
    #[cfg(target_arch = "x86_64")]
    if std::arch::is_x86_feature_detected!("avx2") {
        #[target_feature(enable = "avx2")]
        fn compiled_for_avx2<R>(work: impl FnOnce() -> R) -> R {
            work()
        }
        // SAFETY: the CPU supports AVX2, checked on the line above.
        return unsafe { compiled_for_avx2(work) };
    }
    work()
}
