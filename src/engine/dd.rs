//! Double-double arithmetic: an unevaluated sum `hi + lo` of two `f64`s, good for about 32
//! significant digits.
//!
//! Why: released estimates are linear combinations of integer grid values that can exceed
//! 2^80 (fine grids for the linear kind). Plain `f64` keeps 16 digits, which is not enough to
//! centre normal equations of ill-conditioned data afterwards (NIST StRD Longley). The
//! error-free transformations are Knuth's TwoSum and the FMA-based TwoProd (Dekker 1971;
//! Hida, Li & Bailey, "Library for double-double and quad-double arithmetic", 2007).

use std::ops::{Add, Mul, Neg, Sub};

/// A double-double number `hi + lo` with `|lo| <= ulp(hi)/2`.
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Dd {
    /// Leading part; the value rounded to `f64`.
    pub hi: f64,
    /// Trailing part.
    pub lo: f64,
}

/// Knuth's TwoSum: `a + b = s + e` exactly.
fn two_sum(a: f64, b: f64) -> (f64, f64) {
    let s = a + b;
    let bb = s - a;
    let e = (a - (s - bb)) + (b - bb);
    (s, e)
}

/// TwoProd with a fused multiply-add: `a * b = p + e` exactly (barring overflow).
fn two_prod(a: f64, b: f64) -> (f64, f64) {
    let p = a * b;
    let e = a.mul_add(b, -p);
    (p, e)
}

impl Dd {
    /// Zero.
    pub const ZERO: Dd = Dd { hi: 0.0, lo: 0.0 };

    /// From one `f64` (exact).
    pub fn from_f64(x: f64) -> Dd {
        Dd { hi: x, lo: 0.0 }
    }

    /// From an `i128`: exact when `|x| < 2^106`, otherwise correctly rounded to about 106 bits.
    pub fn from_i128(x: i128) -> Dd {
        // hi takes the value rounded to f64; the remainder x - hi is then exact in i128
        // (|x - hi| <= ulp/2 < 2^74 for |x| < 2^127) and converts with one more rounding.
        let hi = x as f64;
        // `hi` is within 2^127 so the conversion back cannot overflow except at the very top.
        let rem = x.saturating_sub(hi as i128);
        let (s, e) = two_sum(hi, rem as f64);
        Dd { hi: s, lo: e }
    }

    /// Rounded to the nearest `f64`.
    pub fn to_f64(self) -> f64 {
        self.hi + self.lo
    }
}

impl Add for Dd {
    type Output = Dd;
    fn add(self, o: Dd) -> Dd {
        let (s, e) = two_sum(self.hi, o.hi);
        let e = e + self.lo + o.lo;
        let (hi, lo) = two_sum(s, e);
        Dd { hi, lo }
    }
}

impl Sub for Dd {
    type Output = Dd;
    fn sub(self, o: Dd) -> Dd {
        self + (-o)
    }
}

impl Neg for Dd {
    type Output = Dd;
    fn neg(self) -> Dd {
        Dd {
            hi: -self.hi,
            lo: -self.lo,
        }
    }
}

impl Mul for Dd {
    type Output = Dd;
    fn mul(self, o: Dd) -> Dd {
        let (p, e) = two_prod(self.hi, o.hi);
        let e = e + (self.hi * o.lo + self.lo * o.hi);
        let (hi, lo) = two_sum(p, e);
        Dd { hi, lo }
    }
}

impl Mul<f64> for Dd {
    type Output = Dd;
    fn mul(self, o: f64) -> Dd {
        self * Dd::from_f64(o)
    }
}

impl std::ops::Div for Dd {
    type Output = Dd;
    /// One Newton correction on the f64 quotient (Hida, Li & Bailey 2007, sloppy division).
    fn div(self, o: Dd) -> Dd {
        let q1 = self.hi / o.hi;
        let r = self - o * q1;
        let q2 = r.hi / o.hi;
        let (hi, lo) = two_sum(q1, q2);
        Dd { hi, lo }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn i128_round_trip_is_exact_below_2_pow_106() {
        // Exactness of TwoSum (Knuth, TAOCP vol. 2, 4.2.2): hi + lo reproduces the integer.
        for &x in &[
            0i128,
            1,
            -1,
            (1i128 << 80) + 12345,
            -(1i128 << 100) - 7,
            (1i128 << 105) - 1,
        ] {
            let d = Dd::from_i128(x);
            assert_eq!(d.hi as i128 + d.lo as i128, x, "x = {x}");
        }
    }

    #[test]
    fn cancellation_keeps_small_differences() {
        // (2^80 + 3) - 2^80 = 3: plain f64 returns 0 here.
        let a = Dd::from_i128((1i128 << 80) + 3);
        let b = Dd::from_i128(1i128 << 80);
        assert_eq!((a - b).to_f64(), 3.0);
        let x = Dd::from_i128((1i128 << 70) + 1) * Dd::from_i128((1i128 << 30) + 1);
        let y = Dd::from_i128(1i128 << 100);
        // (2^70+1)(2^30+1) - 2^100 = 2^70 + 2^30 + 1
        let expect = (1i128 << 70) + (1i128 << 30) + 1;
        assert_eq!((x - y).to_f64(), expect as f64);
    }

    #[test]
    fn division_is_accurate_to_about_30_digits() {
        let one = Dd::from_f64(1.0);
        let three = Dd::from_f64(3.0);
        let q = one / three;
        let back = q * three - one;
        assert!(back.to_f64().abs() < 1e-30, "residual {}", back.to_f64());
    }
}
