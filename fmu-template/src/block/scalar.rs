//! The scalar types the block engine runs on: plain `f64`, and a forward-mode dual number
//! carrying N directional derivatives, so one simulation of the discrete model also yields the
//! exact derivatives of every output with respect to N seeded directions.

use std::fmt::Debug;
use std::ops::{Add, Div, Mul, Neg, Sub};

/// What the engine needs of a number. Comparisons (limiters, switches) use `value()`: a branch
/// taken is a branch differentiated, which is the exact derivative of the discrete model away
/// from the measure-zero set of parameters where a comparison flips.
pub trait Scalar:
    Copy
    + Debug
    + Send
    + Sync
    + Add<Output = Self>
    + Sub<Output = Self>
    + Mul<Output = Self>
    + Div<Output = Self>
    + Neg<Output = Self>
{
    /// A constant (zero derivatives).
    fn cst(x: f64) -> Self;
    /// The value without derivatives.
    fn value(&self) -> f64;
    fn exp(self) -> Self;
    /// e^x − 1, accurate for small x.
    fn exp_m1(self) -> Self;
    /// Square root; at 0 the derivative is taken as 0 (the subgradient of |·| in the magnitude
    /// block, where a bolted fault drives the terminal voltage to exactly 0).
    fn sqrt(self) -> Self;
    fn sin(self) -> Self;
    fn cos(self) -> Self;
    /// atan2(self, x); at (0, 0) the derivative is taken as 0.
    fn atan2(self, x: Self) -> Self;

    fn scale(self, k: f64) -> Self {
        self * Self::cst(k)
    }
}

impl Scalar for f64 {
    fn cst(x: f64) -> Self {
        x
    }
    fn value(&self) -> f64 {
        *self
    }
    fn exp(self) -> Self {
        f64::exp(self)
    }
    fn exp_m1(self) -> Self {
        f64::exp_m1(self)
    }
    fn sqrt(self) -> Self {
        f64::sqrt(self)
    }
    fn sin(self) -> Self {
        f64::sin(self)
    }
    fn cos(self) -> Self {
        f64::cos(self)
    }
    fn atan2(self, x: Self) -> Self {
        f64::atan2(self, x)
    }
    fn scale(self, k: f64) -> Self {
        self * k
    }
}

/// A value with N directional derivatives (forward-mode automatic differentiation).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Dual<const N: usize> {
    pub v: f64,
    pub d: [f64; N],
}

impl<const N: usize> Dual<N> {
    /// A value whose derivative is 1 along direction `k` and 0 along the others.
    pub fn seeded(v: f64, k: usize, dv: f64) -> Self {
        let mut d = [0.0; N];
        d[k] = dv;
        Self { v, d }
    }

    /// Chain rule for a unary function with value `f` and derivative `df` at `self.v`. A zero
    /// derivative wins over an infinite `df` (0·∞ would be NaN), so constants stay constants.
    fn chain(self, f: f64, df: f64) -> Self {
        let mut d = [0.0; N];
        for (o, s) in d.iter_mut().zip(self.d.iter()) {
            // exact zero test: a structurally zero derivative stays zero
            *o = if *s == 0.0 { 0.0 } else { df * s };
        }
        Self { v: f, d }
    }
}

impl<const N: usize> Add for Dual<N> {
    type Output = Self;
    fn add(mut self, o: Self) -> Self {
        self.v += o.v;
        for (a, b) in self.d.iter_mut().zip(o.d.iter()) {
            *a += b;
        }
        self
    }
}

impl<const N: usize> Sub for Dual<N> {
    type Output = Self;
    fn sub(mut self, o: Self) -> Self {
        self.v -= o.v;
        for (a, b) in self.d.iter_mut().zip(o.d.iter()) {
            *a -= b;
        }
        self
    }
}

impl<const N: usize> Mul for Dual<N> {
    type Output = Self;
    fn mul(self, o: Self) -> Self {
        let mut d = [0.0; N];
        for ((r, a), b) in d.iter_mut().zip(self.d.iter()).zip(o.d.iter()) {
            *r = a * o.v + b * self.v;
        }
        Self { v: self.v * o.v, d }
    }
}

impl<const N: usize> Div for Dual<N> {
    type Output = Self;
    fn div(self, o: Self) -> Self {
        let q = self.v / o.v;
        let mut d = [0.0; N];
        for ((r, a), b) in d.iter_mut().zip(self.d.iter()).zip(o.d.iter()) {
            *r = (a - q * b) / o.v;
        }
        Self { v: q, d }
    }
}

impl<const N: usize> Neg for Dual<N> {
    type Output = Self;
    fn neg(mut self) -> Self {
        self.v = -self.v;
        for a in self.d.iter_mut() {
            *a = -*a;
        }
        self
    }
}

impl<const N: usize> Scalar for Dual<N> {
    fn cst(x: f64) -> Self {
        Self { v: x, d: [0.0; N] }
    }
    fn value(&self) -> f64 {
        self.v
    }
    fn exp(self) -> Self {
        let e = self.v.exp();
        self.chain(e, e)
    }
    fn exp_m1(self) -> Self {
        self.chain(self.v.exp_m1(), self.v.exp())
    }
    fn sqrt(self) -> Self {
        let s = self.v.sqrt();
        let ds = if s > 0.0 { 0.5 / s } else { 0.0 };
        self.chain(s, ds)
    }
    fn sin(self) -> Self {
        self.chain(self.v.sin(), self.v.cos())
    }
    fn cos(self) -> Self {
        self.chain(self.v.cos(), -self.v.sin())
    }
    fn atan2(self, x: Self) -> Self {
        let r2 = self.v * self.v + x.v * x.v;
        let mut d = [0.0; N];
        if r2 > 0.0 {
            // d atan2(y, x) = (x dy − y dx)/(x² + y²)
            for ((o, dy), dx) in d.iter_mut().zip(self.d.iter()).zip(x.d.iter()) {
                *o = (x.v * dy - self.v * dx) / r2;
            }
        }
        Self {
            v: self.v.atan2(x.v),
            d,
        }
    }
    fn scale(mut self, k: f64) -> Self {
        self.v *= k;
        for a in self.d.iter_mut() {
            *a *= k;
        }
        self
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d1(v: f64) -> Dual<1> {
        Dual::seeded(v, 0, 1.0)
    }

    fn check(f: impl Fn(Dual<1>) -> Dual<1>, g: impl Fn(f64) -> f64, x: f64) {
        let h = 1e-6;
        let fd = (g(x + h) - g(x - h)) / (2.0 * h);
        let ad = f(d1(x)).d[0];
        assert!(
            (fd - ad).abs() <= 1e-7 * (1.0 + fd.abs()),
            "x = {x}: dual {ad}, finite difference {fd}"
        );
    }

    #[test]
    fn elementary_derivatives_match_central_differences() {
        for &x in &[0.3, 1.7, -0.9] {
            check(|a| a.exp(), f64::exp, x);
            check(|a| a.exp_m1(), f64::exp_m1, x);
            check(|a| a.sin() * a.cos(), |a| a.sin() * a.cos(), x);
            check(
                |a| (a * a + Dual::cst(1.0)).sqrt() / (a + Dual::cst(3.0)),
                |a| (a * a + 1.0).sqrt() / (a + 3.0),
                x,
            );
            check(|a| a.atan2(Dual::cst(0.4) - a), |a| a.atan2(0.4 - a), x);
            check(|a| -a.scale(2.5) - a, |a| -2.5 * a - a, x);
        }
    }

    #[test]
    fn sqrt_of_a_constant_zero_has_zero_derivative() {
        let z = Dual::<2>::cst(0.0).sqrt();
        assert!(z.d.iter().all(|d| d.abs() == 0.0));
        // exp of a very negative value times a huge derivative stays finite
        let t = Dual::<1>::seeded(1e-12, 0, 1e-12);
        let a = -(-(Dual::cst(1e-3) / t)).exp_m1();
        assert!(a.d[0].is_finite());
    }
}
