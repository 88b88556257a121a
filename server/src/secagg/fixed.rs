//! Fixed-point encoding of `f64` values into the ring Z_{2^64} and decoding of
//! sums of encoded values.
//!
//! A value x is encoded as round(x · 2^k) in two's complement, wrapped into a
//! `u64`. Adding encodings with wrapping arithmetic adds the values, as long
//! as the true sum of the scaled values stays within the signed 64-bit range
//! [−2^63, 2^63). [`FixedPoint`] guarantees that for up to `max_summands`
//! values by refusing any |x| above [`FixedPoint::limit`] =
//! (2^63 − 1) / (max_summands · 2^k) (rounded down a little further, to stay
//! clear of `f64` rounding).
//!
//! Precision: each encoding is off by at most 2^−(k+1) (round to nearest), so
//! a decoded sum of n values is within n · 2^−(k+1) of the exact sum, plus the
//! `f64` rounding of the final conversion (relative 2^−53) when the sum's
//! magnitude exceeds 2^(53−k).

use super::SecAggError;

/// Fixed-point codec: `frac_bits` fractional bits, sums of at most
/// `max_summands` values.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FixedPoint {
    frac_bits: u32,
    max_summands: u64,
}

impl FixedPoint {
    /// A codec with scale 2^`frac_bits` for sums of up to `max_summands`
    /// values.
    ///
    /// # Errors
    /// [`SecAggError::InvalidParams`] when `frac_bits > 52` or
    /// `max_summands == 0`.
    pub fn new(frac_bits: u32, max_summands: u64) -> Result<Self, SecAggError> {
        if frac_bits > 52 || max_summands == 0 {
            return Err(SecAggError::InvalidParams(format!(
                "fixed point needs 0..=52 fractional bits and at least one summand \
                 (got {frac_bits} bits, {max_summands} summands)"
            )));
        }
        Ok(Self {
            frac_bits,
            max_summands,
        })
    }

    /// The scale 2^k.
    fn scale(&self) -> f64 {
        (1u64 << self.frac_bits) as f64
    }

    /// Largest accepted |x|: sums of `max_summands` such values cannot wrap.
    pub fn limit(&self) -> f64 {
        // (2^63 − 1) / n is below 2^63 / n; shaving 1 ulp-ish margin (0.5 of
        // the scaled unit plus f64 rounding) keeps round(x · 2^k) · n < 2^63.
        let per_value = (i64::MAX / i64::try_from(self.max_summands).unwrap_or(i64::MAX)) as f64;
        (per_value * (1.0 - 1e-12) - 1.0) / self.scale()
    }

    /// Largest guaranteed error of a decoded sum of `n` values.
    pub fn sum_error_bound(&self, n: u64) -> f64 {
        n as f64 * 0.5 / self.scale()
    }

    /// Encodes `values` into ring elements.
    ///
    /// # Errors
    /// [`SecAggError::NonFinite`] or [`SecAggError::OutOfRange`] naming the
    /// first offending index.
    pub fn encode(&self, values: &[f64]) -> Result<Vec<u64>, SecAggError> {
        let limit = self.limit();
        values
            .iter()
            .enumerate()
            .map(|(index, &x)| {
                if !x.is_finite() {
                    return Err(SecAggError::NonFinite { index });
                }
                if x.abs() > limit {
                    return Err(SecAggError::OutOfRange {
                        index,
                        value: x,
                        limit,
                    });
                }
                // |x · 2^k| < 2^63 by the limit, so the cast is exact after
                // rounding; `as u64` reinterprets two's complement.
                Ok(((x * self.scale()).round() as i64) as u64)
            })
            .collect()
    }

    /// Decodes a wrapping sum of `summands` encoded vectors.
    ///
    /// # Errors
    /// [`SecAggError::InvalidParams`] when `summands` exceeds the codec's
    /// `max_summands` (the sum may have wrapped).
    pub fn decode_sum(&self, sum: &[u64], summands: u64) -> Result<Vec<f64>, SecAggError> {
        if summands > self.max_summands {
            return Err(SecAggError::InvalidParams(format!(
                "sum of {summands} values decoded with a codec for at most {}",
                self.max_summands
            )));
        }
        Ok(sum
            .iter()
            .map(|&s| (s as i64) as f64 / self.scale())
            .collect())
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha20Rng;

    #[test]
    fn sums_of_mixed_sign_values_round_trip_within_bound() {
        let mut rng = ChaCha20Rng::seed_from_u64(11);
        let n = 100u64;
        let codec = FixedPoint::new(24, n).unwrap();
        let len = 40;
        let mut exact = vec![0.0f64; len];
        let mut acc = vec![0u64; len];
        for _ in 0..n {
            let xs: Vec<f64> = (0..len)
                .map(|_| rng.random_range(-1000.0..1000.0))
                .collect();
            for (e, x) in exact.iter_mut().zip(&xs) {
                *e += x;
            }
            for (a, y) in acc.iter_mut().zip(codec.encode(&xs).unwrap()) {
                *a = a.wrapping_add(y);
            }
        }
        let decoded = codec.decode_sum(&acc, n).unwrap();
        let bound = codec.sum_error_bound(n) + 1e-9;
        for (d, e) in decoded.iter().zip(&exact) {
            assert!((d - e).abs() <= bound, "{d} vs {e}");
        }
        // Negative totals survive the wrap.
        let neg = codec.encode(&[-3.5, -0.25]).unwrap();
        assert_eq!(codec.decode_sum(&neg, 1).unwrap(), vec![-3.5, -0.25]);
    }

    #[test]
    fn extremes_at_the_limit_do_not_wrap() {
        let n = 7u64;
        let codec = FixedPoint::new(16, n).unwrap();
        let lim = codec.limit();
        for sign in [1.0, -1.0] {
            let enc = codec.encode(&[sign * lim]).unwrap()[0];
            let sum = (0..n).fold(0u64, |a, _| a.wrapping_add(enc));
            let got = codec.decode_sum(&[sum], n).unwrap()[0];
            assert!((got - sign * lim * n as f64).abs() <= codec.sum_error_bound(n) * 2.0 + 1e-3);
            assert_eq!(got.signum(), sign);
        }
    }

    #[test]
    fn refuses_non_finite_and_out_of_range_naming_the_index() {
        let codec = FixedPoint::new(20, 10).unwrap();
        assert_eq!(
            codec.encode(&[1.0, f64::NAN]),
            Err(SecAggError::NonFinite { index: 1 })
        );
        assert_eq!(
            codec.encode(&[f64::NEG_INFINITY]),
            Err(SecAggError::NonFinite { index: 0 })
        );
        let too_big = codec.limit() * 2.0;
        assert!(matches!(
            codec.encode(&[0.0, 0.0, too_big]),
            Err(SecAggError::OutOfRange { index: 2, .. })
        ));
        assert!(codec.decode_sum(&[0], 11).is_err());
        assert!(FixedPoint::new(53, 1).is_err());
    }
}
