//! Run-time choice of the SIMD level for the per-bin loops.
//!
//! A function wrapped in [`per_bin_loop!`] is compiled once for each instruction-set level
//! below and the best one the processor offers is chosen when it is first called, with no
//! build flag: AVX-512 (8 doubles per instruction), AVX2 with FMA, SSE4.2, NEON, and the
//! plain build. The loops must stay element-wise or sum in a fixed order (Rust never fuses a
//! multiply and an add on its own), so every level gives the same bits.

/// Wraps one function (doc comments and attributes included) so that it is compiled for each
/// SIMD level of this module and dispatched at run time.
macro_rules! per_bin_loop {
    ($function:item) => {
        #[multiversion::multiversion(targets("x86_64+avx512f+avx512bw+avx512cd+avx512dq+avx512vl", "x86_64+avx2+fma", "x86_64+sse4.2", "aarch64+neon"))]
        $function
    };
}
pub(crate) use per_bin_loop;
