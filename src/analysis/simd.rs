//! Run-time choice between a portable build of a hot loop and one compiled
//! with AVX2, so the binary runs on any x86-64 yet uses wide vectors where the
//! CPU has them. The loop is written once; the compiler vectorises it twice.
//!
//! The CPU is asked once per process ([`has_avx2`]), and the loops that use
//! [`multiversion!`] are whole-frame passes, so each pass over a frame makes
//! one choice, not one per run or row of pixels. What each loop computes is
//! left to its module ([`super::label`], [`super::quality`]); this file is the
//! only place in the crate that needs `unsafe` for SIMD.

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

/// For tests: says on stderr, once per `what`, that only the portable build of
/// `what` was checked because this CPU lacks AVX2. Written to stderr directly,
/// past the test harness's capture, so the skip shows in a passing run.
#[cfg(test)]
pub(crate) fn report_no_avx2(what: &'static str) {
    use std::io::Write;
    use std::sync::{Mutex, PoisonError};
    static SAID: Mutex<Vec<&str>> = Mutex::new(Vec::new());
    let mut said = SAID.lock().unwrap_or_else(PoisonError::into_inner);
    if !said.contains(&what) {
        said.push(what);
        let _ = writeln!(
            std::io::stderr(),
            "{what}: this CPU lacks AVX2, so its AVX2 build was not compared (portable build only)"
        );
    }
}

/// Inputs for tests that compare the two builds of a [`multiversion!`] loop.
#[cfg(test)]
pub(crate) mod test_inputs {
    use proptest::prelude::*;

    /// Row lengths around the 32-pixel blocks and 256-bit vectors (0, 1, 31,
    /// 32, 33, ...), anything up to 200, and long rows.
    pub(crate) fn lengths() -> impl Strategy<Value = usize> {
        prop_oneof![
            prop::sample::select(vec![0usize, 1, 2, 3, 15, 16, 17, 31, 32, 33, 63, 64, 65]),
            0usize..200,
            prop::sample::select(vec![1000usize, 2048, 4095, 4096, 4097]),
        ]
    }

    /// Thresholds at the ends of the range, in 8-bit range, and anywhere.
    pub(crate) fn thresholds() -> impl Strategy<Value = u16> {
        prop_oneof![
            prop::sample::select(vec![0u16, 1, 254, 255, 256, u16::MAX - 1, u16::MAX]),
            0u16..300,
            any::<u16>(),
        ]
    }

    /// `n` pixel values in runs of 1 to 300 pixels, each run at `t`, at `t + 1`
    /// or `t - 1`, anywhere at or below `t`, anywhere above it, or anywhere;
    /// the runs repeat until `n` values are drawn.
    pub(crate) fn pixels_near(t: u16, n: usize) -> impl Strategy<Value = Vec<u16>> {
        let run = (
            1usize..=300,
            0u8..6,
            prop::collection::vec(any::<u16>(), 300),
        );
        prop::collection::vec(run, 1..12).prop_map(move |runs| {
            let mut out = Vec::with_capacity(n);
            while out.len() < n {
                for (len, kind, noise) in &runs {
                    for &r in noise.iter().take(*len) {
                        if out.len() == n {
                            return out;
                        }
                        out.push(match kind {
                            0 => t,
                            1 => t.saturating_add(1),
                            2 => t.saturating_sub(1),
                            // At most t: r mod (t + 1) < 65536.
                            3 => (u32::from(r) % (u32::from(t) + 1)) as u16,
                            // Above t when anything is (t < 65535).
                            4 => t.saturating_add(1).max(r),
                            _ => r,
                        });
                    }
                }
            }
            out
        })
    }
}
