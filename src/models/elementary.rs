//! exp and log1p in plain arithmetic, for the logistic passes: no call into the C library, so
//! the compiler can vectorise the loops that use them, and the bits do not depend on the
//! library's version. Accurate to about 1 ulp (a unit test checks 2 ulp against the standard
//! library over a million arguments); exp is 0 below exp's normal range.

/// ln 2 split so that k * LN2_HI is exact for |k| < 2^11 (Cody and Waite's reduction): the
/// split fdlibm uses (recalled from memory, then checked: LN2_HI ends in 21 zero bits, and
/// LN2_HI + LN2_LO is ln 2 to 1.2e-26, by Python's `decimal`; a unit test checks what f64
/// can).
const LN2_HI: f64 = f64::from_bits(0x3fe6_2e42_fee0_0000);
const LN2_LO: f64 = f64::from_bits(0x3dea_39ef_3579_3c76);
const INV_LN2: f64 = std::f64::consts::LOG2_E;
/// 1.5 x 2^52: adding and subtracting it rounds to the nearest integer (ties to even) for
/// |v| < 2^51, in plain arithmetic.
const ROUNDER: f64 = 6_755_399_441_055_744.0;

/// Below this, `exp_nonpositive` returns 0 (exp(-708.39) is the smallest normal number,
/// 2.2e-308; a probability that small is 0 to every sum it enters).
pub const EXP_FLOOR: f64 = -708.39;

/// exp(x) for x <= 0 (the logistic passes take exp(-|eta|)); 0 below `EXP_FLOOR`. Branch-free
/// and without integer conversions, so a loop of them vectorises.
#[inline(always)]
pub fn exp_nonpositive(x: f64) -> f64 {
    let under = x < EXP_FLOOR;
    let x = x.max(EXP_FLOOR);
    // t holds k = round(x / ln 2) in the low bits of its mantissa.
    let t = x * INV_LN2 + ROUNDER;
    let k = t - ROUNDER;
    let r = (x - k * LN2_HI) - k * LN2_LO;
    // exp(r) for |r| <= ln 2 / 2 by its Taylor series to degree 13 (the next term is below
    // 2e-17 of the sum), Horner's rule.
    let mut p = 1.0 / 6_227_020_800.0;
    p = p * r + 1.0 / 479_001_600.0;
    p = p * r + 1.0 / 39_916_800.0;
    p = p * r + 1.0 / 3_628_800.0;
    p = p * r + 1.0 / 362_880.0;
    p = p * r + 1.0 / 40_320.0;
    p = p * r + 1.0 / 5_040.0;
    p = p * r + 1.0 / 720.0;
    p = p * r + 1.0 / 120.0;
    p = p * r + 1.0 / 24.0;
    p = p * r + 1.0 / 6.0;
    p = p * r + 0.5;
    p = p * r + 1.0;
    p = p * r + 1.0;
    // 2^k from k's bits: k in -1022..=0 here, so 2^k is a normal number.
    let scale = f64::from_bits((t.to_bits().wrapping_add(1023)) << 52);
    if under { 0.0 } else { p * scale }
}

/// log(1 + x) for 0 <= x <= 1.
#[inline(always)]
pub fn log1p_unit(x: f64) -> f64 {
    let u = 1.0 + x;
    // The rounding of 1 + x, put back to first order.
    let c = (x - (u - 1.0)) / u;
    // u = 2^k m with m in [sqrt(1/2), sqrt(2)).
    let big = u > std::f64::consts::SQRT_2;
    let m = if big { u * 0.5 } else { u };
    let k = if big { 1.0 } else { 0.0 };
    let f = m - 1.0;
    // log(m) = 2 atanh(s), s = f / (2 + f), |s| <= 0.1716: the series to s^23.
    let s = f / (2.0 + f);
    let z = s * s;
    let mut q = 1.0 / 23.0;
    q = q * z + 1.0 / 21.0;
    q = q * z + 1.0 / 19.0;
    q = q * z + 1.0 / 17.0;
    q = q * z + 1.0 / 15.0;
    q = q * z + 1.0 / 13.0;
    q = q * z + 1.0 / 11.0;
    q = q * z + 1.0 / 9.0;
    q = q * z + 1.0 / 7.0;
    q = q * z + 1.0 / 5.0;
    q = q * z + 1.0 / 3.0;
    // 2 s (1 + z q) = f - s f + 2 s z q ... computed as f - s (f - 2 z q): f is exact, so the
    // rounding errors stay small next to it.
    let log_m = f - s * (f - 2.0 * z * q);
    k * LN2_HI + (log_m + (k * LN2_LO + c))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn ulps(a: f64, b: f64) -> u64 {
        if a == b {
            return 0;
        }
        (a.to_bits() as i64 - b.to_bits() as i64).unsigned_abs()
    }

    #[test]
    fn the_split_of_ln2_is_exact_enough() {
        assert_eq!(LN2_HI.to_bits().trailing_zeros(), 21);
        // The sum is ln 2 rounded, and the low part carries what the high part drops.
        assert_eq!(LN2_HI + LN2_LO, std::f64::consts::LN_2);
        // LN_2 - LN2_HI is exact; it differs from LN2_LO only by LN_2's own rounding.
        let tail = std::f64::consts::LN_2 - LN2_HI;
        assert!((tail - LN2_LO).abs() <= 0.5 * f64::EPSILON * std::f64::consts::LN_2);
    }

    /// Against the standard library (glibc here) on a million arguments each and the edges.
    #[test]
    fn within_two_ulps_of_the_standard_library() {
        let mut rng = crate::testgen::Lcg(17);
        let mut worst = (0, 0);
        for i in 0..1_000_000 {
            let u = rng.unit();
            // Mostly the logistic range, some far into the tail.
            let x = if i % 10 == 0 {
                EXP_FLOOR * u
            } else {
                -40.0 * u
            };
            let e = ulps(exp_nonpositive(x), x.exp());
            let v = u;
            let l = ulps(log1p_unit(v), v.ln_1p());
            worst = (worst.0.max(e), worst.1.max(l));
        }
        assert!(worst.0 <= 2 && worst.1 <= 2, "{worst:?}");
        for x in [0.0, -0.0, -1e-300, -0.5, -708.0, EXP_FLOOR] {
            let (got, want) = (exp_nonpositive(x), x.exp());
            assert!(ulps(got, want) <= 2, "exp({x}) = {got:e}, want {want:e}");
        }
        for x in [-708.4, -744.0, -746.0, -1e10, f64::NEG_INFINITY] {
            assert_eq!(exp_nonpositive(x), 0.0, "exp({x})");
        }
        for x in [0.0, 1e-300, 1e-17, 1e-9, 0.414, 0.41421356, 0.5, 1.0] {
            assert!(ulps(log1p_unit(x), x.ln_1p()) <= 2, "log1p({x})");
        }
    }
}
