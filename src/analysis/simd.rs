//! Run-time choice between a portable build of a hot loop and one compiled
//! with AVX2, so the binary runs on any x86-64 yet uses wide vectors where the
//! CPU has them. The loop is written once; the compiler vectorises it twice.
//!
//! The CPU is asked once per process ([`has_avx2`]). What each loop computes
//! is left to its module ([`super::label`], [`super::quality`]); this file is
//! the only place in the crate that needs `unsafe` for SIMD.

use std::sync::LazyLock;

/// Whether this CPU has AVX2. The CPU is asked on the first call and the answer
/// kept for the life of the process.
pub(crate) fn has_avx2() -> bool {
    static AVX2: LazyLock<bool> = LazyLock::new(|| {
        #[cfg(target_arch = "x86_64")]
        {
            std::arch::is_x86_feature_detected!("avx2")
        }
        #[cfg(not(target_arch = "x86_64"))]
        {
            false
        }
    });
    *AVX2
}

/// Defines `fn $name(..) -> $ret`, whose body is compiled for the baseline CPU
/// and again with AVX2 enabled, and which runs the AVX2 build when
/// [`has_avx2`] says so.
///
/// Next to it, a module of the same name holds both builds so tests can
/// compare them: `$name::portable(..)`, and `$name::avx2(..)`, which returns
/// `None` without running anything when the CPU lacks AVX2 (always, on CPUs
/// other than x86-64). Arguments must be `Copy` (slices, references, numbers):
/// the dispatcher passes them to `avx2` and, when it declines, to `portable`.
///
/// Multiversion a whole-frame loop, not a per-pixel or per-run kernel: a
/// `#[target_feature]` function cannot be inlined into a caller built without
/// it, so each dispatch is a call. Kernels the loop calls should be
/// `#[inline(always)]` so they are built into both variants.
macro_rules! multiversion {
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty $body:block) => {
        $(#[$meta])*
        $vis fn $name($($arg: $ty),*) -> $ret {
            match $name::avx2($($arg),*) {
                Some(result) => result,
                None => $name::portable($($arg),*),
            }
        }

        /// The two builds of the function of the same name.
        $vis mod $name {
            #[allow(unused_imports)]
            use super::*;

            /// The body as written, built for the baseline CPU.
            #[inline(always)]
            pub(crate) fn portable($($arg: $ty),*) -> $ret $body

            /// The body built with AVX2; `None`, without running it, when this
            /// CPU lacks AVX2.
            #[allow(unsafe_code)]
            pub(crate) fn avx2($($arg: $ty),*) -> Option<$ret> {
                #[cfg(target_arch = "x86_64")]
                {
                    #[target_feature(enable = "avx2")]
                    fn built_with_avx2($($arg: $ty),*) -> $ret {
                        portable($($arg),*)
                    }
                    if $crate::analysis::simd::has_avx2() {
                        // SAFETY: `built_with_avx2` needs no CPU feature beyond
                        // AVX2, and `has_avx2` found AVX2 on this CPU.
                        return Some(unsafe { built_with_avx2($($arg),*) });
                    }
                }
                #[cfg(not(target_arch = "x86_64"))]
                {
                    $(let _ = $arg;)*
                }
                None
            }
        }
    };
}

pub(crate) use multiversion;
