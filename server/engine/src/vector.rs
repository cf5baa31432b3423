//! Run-time choice of wider vector instructions for the per-pixel loops.
//!
//! The release build targets plain x86-64 (SSE2), so that one binary runs on any x86-64 machine. SSE2 has
//! no 32-bit multiply across lanes, so loops such as the Laplacian's sum of squares stay scalar. The macro
//! below compiles one Rust body twice, once as it is and once with AVX2 enabled, and picks the AVX2 copy
//! when the CPU reports AVX2. Both copies are the same source and do the same integer arithmetic and the
//! same table lookups, so they give the same bits (the tests of the callers run on whichever copy this
//! machine picks, and `same_bits_with_and_without_avx2` in `frame`, `preprocess` and `quality` compares the
//! two).

/// Defines `fn $name($args) -> $ret` (with the given visibility) running `$body` compiled for AVX2 when the
/// CPU has it, and a private `fn $plain` with the same body compiled for the build's baseline, which
/// `$name` falls back to and tests compare with.
macro_rules! with_avx2 {
    (
        $(#[$meta:meta])*
        $vis:vis fn $name:ident / $plain:ident ( $($arg:ident : $ty:ty),* $(,)? ) $(-> $ret:ty)? $body:block
    ) => {
        $(#[$meta])*
        $vis fn $name($($arg: $ty),*) $(-> $ret)? {
            #[cfg(target_arch = "x86_64")]
            {
                #[target_feature(enable = "avx2")]
                fn wide($($arg: $ty),*) $(-> $ret)? $body
                if std::arch::is_x86_feature_detected!("avx2") {
                    // SAFETY: `wide` only needs AVX2, and the CPU has just reported it.
                    return unsafe { wide($($arg),*) };
                }
            }
            $plain($($arg),*)
        }

        #[inline(always)]
        fn $plain($($arg: $ty),*) $(-> $ret)? $body
    };
}

pub(crate) use with_avx2;

/// Deterministic noise bytes (xorshift64) for tests, continuing from call to call.
#[cfg(test)]
pub(crate) struct Noise(u64);

#[cfg(test)]
impl Noise {
    /// A generator from `seed` (made odd, as xorshift needs a non-zero state).
    pub(crate) fn new(seed: u64) -> Self {
        Self(seed | 1)
    }

    /// The next `n` bytes.
    pub(crate) fn bytes(&mut self, n: usize) -> Vec<u8> {
        (0..n)
            .map(|_| {
                self.0 ^= self.0 << 13;
                self.0 ^= self.0 >> 7;
                self.0 ^= self.0 << 17;
                (self.0 >> 24) as u8
            })
            .collect()
    }
}

/// `n` noise bytes from `seed`, for the tests that compare the two copies.
#[cfg(test)]
pub(crate) fn noise(seed: u64, n: usize) -> Vec<u8> {
    Noise::new(seed).bytes(n)
}
