//! Streaming statistics in fixed memory.

/// The float operations [`Welford`] needs; implemented for `f32` and `f64`.
pub trait Real: Copy + PartialOrd {
    /// 0.
    const ZERO: Self;
    /// a + b.
    fn add(self, o: Self) -> Self;
    /// a − b.
    fn sub(self, o: Self) -> Self;
    /// a · b.
    fn mul(self, o: Self) -> Self;
    /// a / b.
    fn div(self, o: Self) -> Self;
    /// From a count.
    fn from_count(n: u64) -> Self;
}

macro_rules! real {
    ($t:ty, $from_count:path) => {
        impl Real for $t {
            const ZERO: Self = 0.0;
            #[inline]
            fn add(self, o: Self) -> Self {
                self + o
            }
            #[inline]
            fn sub(self, o: Self) -> Self {
                self - o
            }
            #[inline]
            fn mul(self, o: Self) -> Self {
                self * o
            }
            #[inline]
            fn div(self, o: Self) -> Self {
                self / o
            }
            #[inline]
            fn from_count(n: u64) -> Self {
                $from_count(n)
            }
        }
    };
}
real!(f32, count_f32);
real!(f64, count_f64);

/// `n as f32`, the same value, without the library's u64 → f32 routine.
///
/// u32 → f32 is one instruction on a Cortex-M4F; u64 → f32 is a library
/// call (about 33 instructions, 106 bytes of code). A count that fits u32
/// (always, short of 2³² samples) converts in one instruction. A larger one
/// is cut to its top 32 bits with a sticky bit (bit 0 set when any bit cut
/// off is set), converted, and scaled by the exact power of two: the 32-bit
/// value rounds to 24 bits exactly where `n` does (the round bit is kept
/// and the sticky bit is below it), so the result is `n as f32`, correctly
/// rounded, bit for bit (`count_f32_is_the_cast` checks it).
#[inline]
fn count_f32(n: u64) -> f32 {
    let hi = (n >> 32) as u32;
    let lo = n as u32;
    if hi == 0 {
        lo as f32
    } else {
        wide_count_f32(hi, lo)
    }
}

/// [`count_f32`] of `hi · 2³² + lo` with `hi ≠ 0`.
#[inline(never)]
#[cold]
fn wide_count_f32(hi: u32, lo: u32) -> f32 {
    // s in 0..=31: the top set bit of `hi` moves to bit 31.
    let s = hi.leading_zeros();
    let top = (hi << s) | ((lo >> 1) >> (31 - s));
    let sticky = u32::from(lo << s != 0);
    // 2^(32 − s), exact.
    let scale = f32::from_bits((127 + 32 - s) << 23);
    (top | sticky) as f32 * scale
}

/// `n as f64`. u32 → float is one instruction on a Cortex-M4F; u64 → float
/// is a library call. Same value either way, which is why the optimiser
/// merges the two arms back into the library call unless the u32 goes
/// through `black_box` (a store and a load).
#[inline]
fn count_f64(n: u64) -> f64 {
    if n <= u64::from(u32::MAX) {
        core::hint::black_box(n as u32) as f64
    } else {
        n as f64
    }
}

/// Running mean and variance by Welford's method (Welford 1962,
/// Technometrics 4(3)), stable where the textbook sum-of-squares formula
/// cancels catastrophically.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Welford<T> {
    n: u64,
    mean: T,
    m2: T,
}

impl<T: Real> Default for Welford<T> {
    fn default() -> Self {
        Self::new()
    }
}

impl<T: Real> Welford<T> {
    /// Empty.
    pub const fn new() -> Self {
        Welford {
            n: 0,
            mean: T::ZERO,
            m2: T::ZERO,
        }
    }

    /// Adds one observation.
    #[inline]
    pub fn push(&mut self, x: T) {
        self.n += 1;
        let delta = x.sub(self.mean);
        self.mean = self.mean.add(delta.div(T::from_count(self.n)));
        let delta2 = x.sub(self.mean);
        self.m2 = self.m2.add(delta.mul(delta2));
    }

    /// Observations so far.
    pub fn count(&self) -> u64 {
        self.n
    }

    /// Mean (0 when empty).
    pub fn mean(&self) -> T {
        self.mean
    }

    /// Population variance (divides by n; 0 when empty).
    pub fn population_variance(&self) -> T {
        if self.n == 0 {
            T::ZERO
        } else {
            self.m2.div(T::from_count(self.n))
        }
    }

    /// Sample variance (divides by n − 1; 0 with fewer than two observations).
    pub fn sample_variance(&self) -> T {
        if self.n < 2 {
            T::ZERO
        } else {
            self.m2.div(T::from_count(self.n - 1))
        }
    }
}

/// Exponentially weighted moving average `e ← e + λ (x − e)`, starting at a
/// given value (the in-control level, 0 for a standardised score).
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Ewma {
    lambda: f32,
    value: f32,
}

impl Ewma {
    /// Starts at `start` with smoothing constant `lambda` in (0, 1].
    pub const fn new(lambda: f32, start: f32) -> Self {
        Ewma {
            lambda,
            value: start,
        }
    }

    /// Adds one observation and returns the new average.
    #[inline]
    pub fn push(&mut self, x: f32) -> f32 {
        self.value += self.lambda * (x - self.value);
        self.value
    }

    /// Current average.
    pub fn value(&self) -> f32 {
        self.value
    }
}

/// One-sided (upper) tabular CUSUM on a standardised observation:
/// `C ← min(max(0, C + u − k), cap)` (Page 1954; tabular form as in
/// Montgomery, *Introduction to Statistical Quality Control*).
///
/// The cap (twice the decision limit in the detector) bounds how long the sum
/// takes to fall back after the cause has gone, so a flag can clear.
#[derive(Debug, Clone, Copy, PartialEq)]
#[cfg_attr(feature = "defmt", derive(defmt::Format))]
pub struct Cusum {
    slack: f32,
    cap: f32,
    value: f32,
}

impl Cusum {
    /// Reference value `slack` (k) and ceiling `cap`.
    pub const fn new(slack: f32, cap: f32) -> Self {
        Cusum {
            slack,
            cap,
            value: 0.0,
        }
    }

    /// Adds one observation and returns the new sum.
    #[inline]
    pub fn push(&mut self, u: f32) -> f32 {
        let next = self.value + u - self.slack;
        self.value = if next > 0.0 {
            if next < self.cap {
                next
            } else {
                self.cap
            }
        } else {
            0.0
        };
        self.value
    }

    /// Current sum.
    pub fn value(&self) -> f32 {
        self.value
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn welford_small_example() {
        // [2, 4, 4, 4, 5, 5, 7, 9]: mean 5, population variance 4, sample
        // variance 32/7 = 4.5714286 (computed with numpy var(ddof=0/1); the
        // method is Welford 1962).
        let mut w = Welford::<f32>::new();
        for x in [2.0, 4.0, 4.0, 4.0, 5.0, 5.0, 7.0, 9.0] {
            w.push(x);
        }
        assert_eq!(w.count(), 8);
        assert_eq!(w.mean(), 5.0);
        assert_eq!(w.population_variance(), 4.0);
        assert!((w.sample_variance() - 4.571_429).abs() < 1e-6);
    }

    #[test]
    fn welford_large_offset_f64() {
        // 1e9 + {4, 7, 13, 16}: sample variance 30 exactly; the naive
        // sum-of-squares formula gives -170.67 in f64 (computed). Welford's
        // method (1962) keeps it to rounding.
        let xs = [4.0, 7.0, 13.0, 16.0].map(|v| 1e9 + v);
        let mut w = Welford::<f64>::new();
        for x in xs {
            w.push(x);
        }
        assert!((w.sample_variance() - 30.0).abs() < 1e-6);
        let n = 4.0;
        let s: f64 = xs.iter().sum();
        let ss: f64 = xs.iter().map(|x| x * x).sum();
        let naive = (ss - s * s / n) / (n - 1.0);
        assert!((naive - 30.0).abs() > 100.0, "naive formula {naive}");
    }

    #[test]
    fn count_f32_is_the_cast() {
        let check = |n: u64| {
            assert_eq!(count_f32(n).to_bits(), (n as f32).to_bits(), "n = {n:#x}");
        };
        for n in [
            0u64,
            1,
            u64::from(u32::MAX),
            1 << 32,
            (1 << 32) + 1,
            u64::MAX,
            u64::MAX - 1,
            (1 << 63) + (1 << 39) + 1,
            (1 << 63) + (1 << 39),
            (1 << 63) + (1 << 40) + (1 << 39),
            (1 << 56) + (1 << 32) + 1,
        ] {
            check(n);
        }
        // Every top bit position, with round and sticky bits around the
        // cut (the 24th significant bit and below).
        for top in 32u32..64 {
            let base = 1u64 << top;
            let cut = top - 23;
            for low in [0u64, 1, 0x7f, 0x80, 0x81, 0xff, 0x100, 0x17f, 0x180, 0x181] {
                check(base | (low << (cut - 1)));
                check(base | (low << (cut - 1)) | 1);
                check(base | (low << cut));
                check((base | (base - 1)) ^ low);
            }
        }
        // And a pseudo-random sweep of every magnitude.
        let mut x = 0x9e37_79b9_7f4a_7c15u64;
        for _ in 0..200_000 {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            check(x >> (x % 32));
        }
    }

    #[test]
    fn cusum_clamps_and_caps() {
        let mut c = Cusum::new(0.5, 10.0);
        assert_eq!(c.push(-3.0), 0.0);
        assert_eq!(c.push(2.0), 1.5);
        assert_eq!(c.push(2.0), 3.0);
        for _ in 0..100 {
            c.push(5.0);
        }
        assert_eq!(c.value(), 10.0);
    }

    #[test]
    fn ewma_recursion() {
        let mut e = Ewma::new(0.25, 0.0);
        assert_eq!(e.push(4.0), 1.0);
        assert_eq!(e.push(4.0), 1.75);
    }
}
