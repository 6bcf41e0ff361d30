//! The scalar type every model is generic over: `f32` on the device, `f64`
//! on the host.
//!
//! Every transcendental function goes through [`Real`], which calls `libm`
//! explicitly (`libm::sqrtf`, `libm::sqrt`, ...). Host tests therefore run
//! exactly the functions the target runs; method syntax (`x.sqrt()`) on a
//! concrete float would silently pick std's on the host and is not used in
//! this crate. Complex arithmetic (add, multiply, divide) comes from
//! `num-complex`; complex powers are built here from [`Real`] functions.
//!
//! Why `libm` and not `micromath`: see the crate docs' accuracy table.

use core::fmt::{Debug, Display};
use core::ops::{AddAssign, DivAssign, MulAssign, Neg, SubAssign};
use num_complex::Complex;

/// A real scalar (`f32` or `f64`) with explicit `libm` maths.
///
/// Functions are associated (call them as `T::sqrt(x)`), so generic code
/// cannot reach std's inherent methods by accident.
pub trait Real:
    num_traits::Num
    + Copy
    + PartialOrd
    + Neg<Output = Self>
    + AddAssign
    + SubAssign
    + MulAssign
    + DivAssign
    + Debug
    + Display
    + Default
    + 'static
{
    /// Machine epsilon.
    const EPSILON: Self;
    /// pi.
    const PI: Self;
    /// Largest finite value.
    const MAX: Self;
    /// Converts from `f64` (rounding to nearest for `f32`).
    fn from_f64(x: f64) -> Self;
    /// Converts to `f64` (exact).
    fn to_f64(self) -> f64;
    /// Square root (`libm::sqrt[f]`).
    fn sqrt(x: Self) -> Self;
    /// e^x (`libm::exp[f]`).
    fn exp(x: Self) -> Self;
    /// Natural logarithm (`libm::log[f]`).
    fn ln(x: Self) -> Self;
    /// Base-10 logarithm (`libm::log10[f]`).
    fn log10(x: Self) -> Self;
    /// x^y (`libm::pow[f]`).
    fn powf(x: Self, y: Self) -> Self;
    /// Sine (`libm::sin[f]`).
    fn sin(x: Self) -> Self;
    /// Cosine (`libm::cos[f]`).
    fn cos(x: Self) -> Self;
    /// Hyperbolic cosine (`libm::cosh[f]`).
    fn cosh(x: Self) -> Self;
    /// Four-quadrant arctangent of y/x (`libm::atan2[f]`).
    fn atan2(y: Self, x: Self) -> Self;
    /// Arcsine (`libm::asin[f]`).
    fn asin(x: Self) -> Self;
    /// e^x - 1 (`libm::expm1[f]`), exact near 0.
    fn exp_m1(x: Self) -> Self;
    /// Absolute value (`libm::fabs[f]`).
    fn abs(x: Self) -> Self;
    /// Whether the value is neither infinite nor NaN.
    fn is_finite(self) -> bool;

    /// A constant from an `f64` literal.
    #[inline]
    fn c(x: f64) -> Self {
        Self::from_f64(x)
    }
    /// The larger of two values (NaN-propagating for `a`).
    #[inline]
    fn max(a: Self, b: Self) -> Self {
        if a < b {
            b
        } else {
            a
        }
    }
    /// The smaller of two values (NaN-propagating for `a`).
    #[inline]
    fn min(a: Self, b: Self) -> Self {
        if a > b {
            b
        } else {
            a
        }
    }
    /// Clamps `x` to `[lo, hi]`.
    #[inline]
    fn clamp(x: Self, lo: Self, hi: Self) -> Self {
        Self::min(Self::max(x, lo), hi)
    }
    /// Converts a value of another [`Real`] type.
    #[inline]
    fn cast<U: Real>(x: U) -> Self {
        Self::from_f64(x.to_f64())
    }
}

macro_rules! impl_real {
    ($t:ty, $sqrt:path, $exp:path, $ln:path, $log10:path, $pow:path, $sin:path, $cos:path, $cosh:path, $atan2:path, $asin:path, $expm1:path, $abs:path) => {
        impl Real for $t {
            const EPSILON: Self = <$t>::EPSILON;
            const PI: Self = core::f64::consts::PI as $t;
            const MAX: Self = <$t>::MAX;
            #[inline]
            fn from_f64(x: f64) -> Self {
                x as $t
            }
            #[inline]
            fn to_f64(self) -> f64 {
                self as f64
            }
            #[inline]
            fn sqrt(x: Self) -> Self {
                $sqrt(x)
            }
            #[inline]
            fn exp(x: Self) -> Self {
                $exp(x)
            }
            #[inline]
            fn ln(x: Self) -> Self {
                $ln(x)
            }
            #[inline]
            fn log10(x: Self) -> Self {
                $log10(x)
            }
            #[inline]
            fn powf(x: Self, y: Self) -> Self {
                $pow(x, y)
            }
            #[inline]
            fn sin(x: Self) -> Self {
                $sin(x)
            }
            #[inline]
            fn cos(x: Self) -> Self {
                $cos(x)
            }
            #[inline]
            fn cosh(x: Self) -> Self {
                $cosh(x)
            }
            #[inline]
            fn atan2(y: Self, x: Self) -> Self {
                $atan2(y, x)
            }
            #[inline]
            fn asin(x: Self) -> Self {
                $asin(x)
            }
            #[inline]
            fn exp_m1(x: Self) -> Self {
                $expm1(x)
            }
            #[inline]
            fn abs(x: Self) -> Self {
                $abs(x)
            }
            #[inline]
            fn is_finite(self) -> bool {
                <$t>::is_finite(self)
            }
        }
    };
}

impl_real!(
    f32,
    libm::sqrtf,
    libm::expf,
    libm::logf,
    libm::log10f,
    libm::powf,
    libm::sinf,
    libm::cosf,
    libm::coshf,
    libm::atan2f,
    libm::asinf,
    libm::expm1f,
    libm::fabsf
);
impl_real!(
    f64,
    libm::sqrt,
    libm::exp,
    libm::log,
    libm::log10,
    libm::pow,
    libm::sin,
    libm::cos,
    libm::cosh,
    libm::atan2,
    libm::asin,
    libm::expm1,
    libm::fabs
);

/// Complex number over a [`Real`].
pub type Cx<T> = Complex<T>;

/// `(j x)^p` for real `x >= 0`: `x^p (cos(pi p/2) + j sin(pi p/2))`.
///
/// Returns 0 for `x <= 0` and `p > 0`.
#[inline]
pub fn j_pow<T: Real>(x: T, p: T) -> Cx<T> {
    if x <= T::zero() {
        return Cx::new(T::zero(), T::zero());
    }
    let r = T::powf(x, p);
    let phi = T::PI * p / T::c(2.0);
    Cx::new(r * T::cos(phi), r * T::sin(phi))
}

/// Squared magnitude of a complex number.
#[inline]
pub fn norm_sqr<T: Real>(z: Cx<T>) -> T {
    z.re * z.re + z.im * z.im
}

/// Whether both parts of a complex number are finite.
#[inline]
pub fn cx_finite<T: Real>(z: Cx<T>) -> bool {
    z.re.is_finite() && z.im.is_finite()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn j_pow_matches_std_complex_power() {
        // Independent check: std's f64 powf of the polar form (j = e^{j pi/2}).
        for &(x, p) in &[(0.5f64, 0.8f64), (3.0, 1.0), (20.0, 0.65)] {
            let z = j_pow(x, p);
            let r = x.powf(p);
            let phi = std::f64::consts::FRAC_PI_2 * p;
            assert!((z.re - r * phi.cos()).abs() < 1e-12);
            assert!((z.im - r * phi.sin()).abs() < 1e-12);
        }
        // p = 1 gives j x exactly (up to cos(pi/2) rounding).
        let z = j_pow(2.0f64, 1.0);
        assert!(z.re.abs() < 1e-15 && (z.im - 2.0).abs() < 1e-15);
    }

    #[test]
    fn f32_functions_are_libm() {
        // libm is correctly rounded to within 1 ulp here; compare with std f64.
        let x = 2.0f32;
        assert!((<f32 as Real>::sqrt(x) as f64 - 2f64.sqrt()).abs() < 2e-7);
        assert!((<f32 as Real>::exp(x) as f64 - 2f64.exp()).abs() < 1e-6);
    }
}
