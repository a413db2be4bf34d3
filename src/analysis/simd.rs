//! Run-time choice between a portable build of a hot loop and one compiled
//! with AVX2, so the binary runs on any x86-64 yet uses wide vectors where the
//! CPU has them. The loop is written once; the compiler vectorises it twice.

/// Defines `fn $name(..) -> $ret` whose body is compiled for the baseline CPU
/// and again with AVX2 enabled, dispatching on the CPU at run time (the check
/// is a cached flag read).
macro_rules! multiversion {
    ($(#[$meta:meta])* $vis:vis fn $name:ident($($arg:ident: $ty:ty),* $(,)?) -> $ret:ty $body:block) => {
        $(#[$meta])*
        $vis fn $name($($arg: $ty),*) -> $ret {
            #[inline(always)]
            fn portable($($arg: $ty),*) -> $ret $body
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                unsafe fn avx2($($arg: $ty),*) -> $ret {
                    portable($($arg),*)
                }
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: the CPU supports AVX2, checked just above.
                    return unsafe { avx2($($arg),*) };
                }
            }
            portable($($arg),*)
        }
    };
}

pub(crate) use multiversion;
