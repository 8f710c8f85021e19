//! Two `f64` lanes in one register, for estimators that work on two rows
//! at once.
//!
//! Every operation is the IEEE operation of each lane on its own (add,
//! multiply, a NaN test and a select), so a lane holds exactly the bits
//! scalar code computes for its row, in the sandbox and natively. In the
//! sandbox this is WebAssembly's `f64x2` (SIMD, part of WebAssembly 2.0;
//! wasmtime validates it at load); natively a pair of scalars, which the
//! compiler is free to put in one register.
//!
//! What this is not: a general SIMD library. It has the few operations the
//! built-in estimators use, and no operation that could change a lane's bits
//! (no fused multiply-add, no relaxed SIMD, no horizontal reassociation).

#[cfg(target_arch = "wasm32")]
mod imp {
    use core::arch::wasm32::*;

    /// Two lanes.
    #[derive(Clone, Copy)]
    pub(crate) struct F64x2(v128);

    impl F64x2 {
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn new(a: f64, b: f64) -> Self {
            F64x2(f64x2(a, b))
        }
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn splat(a: f64) -> Self {
            F64x2(f64x2_splat(a))
        }
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn add(self, o: Self) -> Self {
            F64x2(f64x2_add(self.0, o.0))
        }
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn mul(self, o: Self) -> Self {
            F64x2(f64x2_mul(self.0, o.0))
        }
        /// Each lane that is NaN replaced by that lane of `fill`.
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn nan_to(self, fill: Self) -> Self {
            let nan = f64x2_ne(self.0, self.0);
            F64x2(v128_bitselect(fill.0, self.0, nan))
        }
        #[inline]
        #[target_feature(enable = "simd128")]
        pub(crate) fn lanes(self) -> (f64, f64) {
            (f64x2_extract_lane::<0>(self.0), f64x2_extract_lane::<1>(self.0))
        }
    }
}

#[cfg(not(target_arch = "wasm32"))]
mod imp {
    /// Two lanes.
    #[derive(Clone, Copy)]
    pub(crate) struct F64x2([f64; 2]);

    impl F64x2 {
        #[inline]
        pub(crate) fn new(a: f64, b: f64) -> Self {
            F64x2([a, b])
        }
        #[inline]
        pub(crate) fn splat(a: f64) -> Self {
            F64x2([a, a])
        }
        #[inline]
        pub(crate) fn add(self, o: Self) -> Self {
            F64x2([self.0[0] + o.0[0], self.0[1] + o.0[1]])
        }
        #[inline]
        pub(crate) fn mul(self, o: Self) -> Self {
            F64x2([self.0[0] * o.0[0], self.0[1] * o.0[1]])
        }
        /// Each lane that is NaN replaced by that lane of `fill`.
        #[inline]
        pub(crate) fn nan_to(self, fill: Self) -> Self {
            let pick = |x: f64, f: f64| if x.is_nan() { f } else { x };
            F64x2([pick(self.0[0], fill.0[0]), pick(self.0[1], fill.0[1])])
        }
        #[inline]
        pub(crate) fn lanes(self) -> (f64, f64) {
            (self.0[0], self.0[1])
        }
    }
}

pub(crate) use imp::F64x2;

#[cfg(test)]
mod tests {
    use super::*;

    /// Lane by lane, the operations give the scalar operations' bits,
    /// NaN replacement included (the cases IEEE 754 makes tricky: signed
    /// zeros, infinities, subnormals, rounding to even).
    #[test]
    fn each_lane_is_the_scalar_operation() {
        let values =
            [0.0, -0.0, 1.0, -1.5, 0.1, 1e308, -1e308, f64::INFINITY, 5e-324, 1.0 + f64::EPSILON, f64::NAN, 3.0];
        let fill = F64x2::new(7.0, -7.0);
        for &a in &values {
            for &b in &values {
                let (x, y) = (F64x2::new(a, b), F64x2::new(b, a));
                let (s0, s1) = x.add(y).lanes();
                let (p0, p1) = x.mul(y).lanes();
                let same = |v: f64, w: f64| v.to_bits() == w.to_bits() || (v.is_nan() && w.is_nan());
                assert!(same(s0, a + b) && same(s1, b + a), "{a} + {b}");
                assert!(same(p0, a * b) && same(p1, b * a), "{a} × {b}");
                let (f0, f1) = x.nan_to(fill).lanes();
                assert!(same(f0, if a.is_nan() { 7.0 } else { a }), "{a}");
                assert!(same(f1, if b.is_nan() { -7.0 } else { b }), "{b}");
                assert_eq!(F64x2::splat(a).lanes().1.to_bits(), a.to_bits());
            }
        }
    }
}
