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
    ($t:ty) => {
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
                // u32 → float is one instruction on a Cortex-M4F; u64 → float
                // is a library call (about 33 instructions). Same value either
                // way, which is why the optimiser merges the two arms back
                // into the library call unless the u32 goes through
                // `black_box` (a store and a load).
                if n <= u64::from(u32::MAX) {
                    core::hint::black_box(n as u32) as $t
                } else {
                    n as $t
                }
            }
        }
    };
}
real!(f32);
real!(f64);

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
