//! Shamir secret sharing over the prime field GF(p), p = 2^61 − 1.
//!
//! Written here rather than taken from a crate: the small well-kept crates
//! (`sharks`, `blahaj`) work in GF(256) and so stop at 255 shares, and
//! `vsss-rs` pulls in elliptic-curve machinery we do not need. A Mersenne
//! prime field gives cheap reduction through `u128` products and room for
//! up to p − 1 ≈ 2.3·10^18 shareholders.
//!
//! A 32-byte secret is carried as [`LIMBS`] field elements of 7 bytes each
//! (every limb is < 2^56 < p), see [`secret_to_limbs`].

use rand::CryptoRng;

/// The field modulus, the Mersenne prime 2^61 − 1.
pub const P: u64 = (1 << 61) - 1;

/// Field elements per 32-byte secret: 32 bytes in limbs of 7 bytes.
pub const LIMBS: usize = 5;

/// Bytes of the secret carried by each limb (the last carries 4).
const LIMB_BYTES: usize = 7;

/// Reduces a value below 2^122 modulo p.
fn reduce(x: u128) -> u64 {
    let p = u128::from(P);
    let folded = (x & p) + (x >> 61);
    let folded = (folded & p) + (folded >> 61);
    // `folded` < 2^62 here; one conditional subtraction finishes.
    let v = u64::try_from(folded).unwrap_or(u64::MAX);
    if v >= P { v - P } else { v }
}

/// a + b mod p for a, b < p.
pub fn add(a: u64, b: u64) -> u64 {
    let s = a + b;
    if s >= P { s - P } else { s }
}

/// a − b mod p for a, b < p.
pub fn sub(a: u64, b: u64) -> u64 {
    if a >= b { a - b } else { a + P - b }
}

/// a · b mod p for a, b < p.
pub fn mul(a: u64, b: u64) -> u64 {
    reduce(u128::from(a) * u128::from(b))
}

/// a^e mod p.
fn pow(mut a: u64, mut e: u64) -> u64 {
    let mut r = 1;
    while e > 0 {
        if e & 1 == 1 {
            r = mul(r, a);
        }
        a = mul(a, a);
        e >>= 1;
    }
    r
}

/// Multiplicative inverse of a non-zero a (Fermat: a^(p−2)).
fn inv(a: u64) -> u64 {
    pow(a, P - 2)
}

/// A uniformly random field element.
pub fn random_element<R: CryptoRng + ?Sized>(rng: &mut R) -> u64 {
    loop {
        let v = rng.next_u64() >> 3;
        if v < P {
            return v;
        }
    }
}

/// Splits a 32-byte secret into [`LIMBS`] field elements, each < 2^56.
pub fn secret_to_limbs(secret: &[u8; 32]) -> [u64; LIMBS] {
    let mut limbs = [0u64; LIMBS];
    for (i, chunk) in secret.chunks(LIMB_BYTES).enumerate() {
        let mut buf = [0u8; 8];
        buf[..chunk.len()].copy_from_slice(chunk);
        limbs[i] = u64::from_le_bytes(buf);
    }
    limbs
}

/// Joins [`LIMBS`] field elements back into a 32-byte secret; `None` when a
/// limb is out of its range (which a correct reconstruction never gives).
pub fn limbs_to_secret(limbs: &[u64; LIMBS]) -> Option<[u8; 32]> {
    let mut secret = [0u8; 32];
    for (i, chunk) in secret.chunks_mut(LIMB_BYTES).enumerate() {
        let bytes = limbs[i].to_le_bytes();
        if bytes[chunk.len()..].iter().any(|&b| b != 0) {
            return None;
        }
        chunk.copy_from_slice(&bytes[..chunk.len()]);
    }
    Some(secret)
}

/// Shares each of `secret` (field elements) with threshold `t`, evaluating at
/// the points `xs` (distinct, non-zero, < p). Returns one row per point: row
/// `i` holds the share of every element for point `xs[i]`.
///
/// Each element gets its own random polynomial of degree t − 1 whose constant
/// term is the element.
pub fn split<R: CryptoRng + ?Sized>(
    secret: &[u64],
    t: usize,
    xs: &[u64],
    rng: &mut R,
) -> Vec<Vec<u64>> {
    let mut rows = vec![Vec::with_capacity(secret.len()); xs.len()];
    for &s in secret {
        let mut coeffs = Vec::with_capacity(t);
        coeffs.push(s % P);
        for _ in 1..t {
            coeffs.push(random_element(rng));
        }
        for (row, &x) in rows.iter_mut().zip(xs) {
            // Horner's rule from the highest coefficient.
            let y = coeffs.iter().rev().fold(0, |acc, &c| add(mul(acc, x), c));
            row.push(y);
        }
    }
    rows
}

/// Barycentric weights w_i = 1 / Π_{k≠i}(x_i − x_k) of the points `xs`.
fn weights(xs: &[u64]) -> Vec<u64> {
    xs.iter()
        .enumerate()
        .map(|(i, &xi)| {
            let d = xs
                .iter()
                .enumerate()
                .filter(|&(k, _)| k != i)
                .fold(1, |acc, (_, &xk)| mul(acc, sub(xi, xk)));
            inv(d)
        })
        .collect()
}

/// The Lagrange basis values L_i(x) of the points `xs` with weights `w`, for
/// an `x` that may or may not be one of the points.
fn basis_at(xs: &[u64], w: &[u64], x: u64) -> Vec<u64> {
    if let Some(pos) = xs.iter().position(|&xi| xi == x) {
        let mut out = vec![0; xs.len()];
        out[pos] = 1;
        return out;
    }
    let n = xs.iter().fold(1, |acc, &xk| mul(acc, sub(x, xk)));
    xs.iter()
        .zip(w)
        .map(|(&xi, &wi)| mul(mul(n, wi), inv(sub(x, xi))))
        .collect()
}

/// Reconstructs secrets from shares held at a fixed set of points, checking
/// that every share lies on one polynomial of degree t − 1.
///
/// Built once per set of points (in secure aggregation every responder sends
/// a share of every needed secret, so the points are the same for all of
/// them). The value at 0 is interpolated from the first `t` points. When more
/// than `t` shares are present, the others are checked with a random linear
/// combination: with secret random r_j, Σ_j r_j (y_j − P(x_j)) must be 0,
/// where P interpolates the first t shares. A wrong share makes that sum
/// non-zero except with probability 1/p ≈ 2^−61 (r_j are unknown to the
/// devices). With exactly `t` shares no check is possible here; the caller
/// then relies on its own check of the reconstructed secret (commitment or
/// public key).
#[derive(Debug, Clone)]
pub struct Reconstructor {
    t: usize,
    /// Lagrange coefficients at 0 for the first `t` points.
    lambda: Vec<u64>,
    /// Random weights r_j for the extra points.
    r: Vec<u64>,
    /// c_i = Σ_j r_j L_i(x_j) over the extra points.
    c: Vec<u64>,
}

/// Why shares could not be used.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ShamirError {
    /// Fewer shares than the threshold.
    TooFewShares {
        /// Shares available.
        have: usize,
        /// Threshold.
        need: usize,
    },
    /// Points are not distinct, zero or not below p.
    BadPoints,
    /// Share count differs from the point count.
    WrongShareCount,
    /// Shares do not lie on one polynomial of degree t − 1.
    Inconsistent,
}

impl Reconstructor {
    /// Prepares reconstruction from shares at `xs` with threshold `t`.
    ///
    /// # Errors
    /// [`ShamirError::TooFewShares`] when `xs.len() < t` (or `t == 0`);
    /// [`ShamirError::BadPoints`] for a zero, repeated or out-of-field point.
    pub fn new<R: CryptoRng + ?Sized>(
        xs: &[u64],
        t: usize,
        rng: &mut R,
    ) -> Result<Self, ShamirError> {
        if t == 0 || xs.len() < t {
            return Err(ShamirError::TooFewShares {
                have: xs.len(),
                need: t.max(1),
            });
        }
        let mut sorted = xs.to_vec();
        sorted.sort_unstable();
        sorted.dedup();
        if sorted.len() != xs.len() || sorted.iter().any(|&x| x == 0 || x >= P) {
            return Err(ShamirError::BadPoints);
        }
        let (base, extra) = xs.split_at(t);
        let w = weights(base);
        let lambda = basis_at(base, &w, 0);
        let r: Vec<u64> = extra.iter().map(|_| random_element(rng)).collect();
        let mut c = vec![0; t];
        for (&xj, &rj) in extra.iter().zip(&r) {
            for (ci, li) in c.iter_mut().zip(basis_at(base, &w, xj)) {
                *ci = add(*ci, mul(rj, li));
            }
        }
        Ok(Self { t, lambda, r, c })
    }

    /// The secret from shares `ys` given in the order of the points.
    ///
    /// # Errors
    /// [`ShamirError::WrongShareCount`] when `ys` does not match the points,
    /// [`ShamirError::Inconsistent`] when a share is off the polynomial.
    pub fn reconstruct(&self, ys: &[u64]) -> Result<u64, ShamirError> {
        if ys.len() != self.t + self.r.len() || ys.iter().any(|&y| y >= P) {
            return Err(ShamirError::WrongShareCount);
        }
        let (base, extra) = ys.split_at(self.t);
        let lhs = extra
            .iter()
            .zip(&self.r)
            .fold(0, |acc, (&y, &r)| add(acc, mul(y, r)));
        let rhs = base
            .iter()
            .zip(&self.c)
            .fold(0, |acc, (&y, &c)| add(acc, mul(y, c)));
        if lhs != rhs {
            return Err(ShamirError::Inconsistent);
        }
        Ok(base
            .iter()
            .zip(&self.lambda)
            .fold(0, |acc, (&y, &l)| add(acc, mul(y, l))))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use rand::SeedableRng;
    use rand::seq::SliceRandom;
    use rand_chacha::ChaCha20Rng;

    fn column(rows: &[Vec<u64>], idx: &[usize], elem: usize) -> Vec<u64> {
        idx.iter().map(|&i| rows[i][elem]).collect()
    }

    #[test]
    fn field_arithmetic_is_consistent() {
        let mut rng = ChaCha20Rng::seed_from_u64(1);
        for _ in 0..1000 {
            let a = random_element(&mut rng);
            let b = random_element(&mut rng);
            assert_eq!(add(sub(a, b), b), a);
            let expected = (u128::from(a) * u128::from(b) % u128::from(P)) as u64;
            assert_eq!(mul(a, b), expected);
            if a != 0 {
                assert_eq!(mul(a, inv(a)), 1);
            }
        }
        assert_eq!(mul(P - 1, P - 1), 1);
    }

    #[test]
    fn limbs_round_trip_and_reject_overflow() {
        let mut rng = ChaCha20Rng::seed_from_u64(2);
        let mut secret = [0u8; 32];
        rand::RngCore::fill_bytes(&mut rng, &mut secret);
        let limbs = secret_to_limbs(&secret);
        assert!(limbs.iter().all(|&l| l < 1 << 56));
        assert_eq!(limbs_to_secret(&limbs), Some(secret));
        let mut bad = limbs;
        bad[4] = 1 << 40; // the last limb carries only 4 bytes
        assert_eq!(limbs_to_secret(&bad), None);
    }

    #[test]
    fn any_t_shares_reconstruct_and_t_minus_one_do_not() {
        let mut rng = ChaCha20Rng::seed_from_u64(3);
        let n = 20;
        let t = 7;
        let secret = [random_element(&mut rng), 42, 0, P - 1];
        let xs: Vec<u64> = (1..=n as u64).collect();
        let rows = split(&secret, t, &xs, &mut rng);
        let mut idx: Vec<usize> = (0..n).collect();
        for _ in 0..20 {
            idx.shuffle(&mut rng);
            let pick = &idx[..t];
            let pts: Vec<u64> = pick.iter().map(|&i| xs[i]).collect();
            let rec = Reconstructor::new(&pts, t, &mut rng).unwrap();
            for (e, &s) in secret.iter().enumerate() {
                assert_eq!(rec.reconstruct(&column(&rows, pick, e)).unwrap(), s);
            }
            // t − 1 shares, interpolated as if they were enough, miss.
            let short = &pick[..t - 1];
            let pts: Vec<u64> = short.iter().map(|&i| xs[i]).collect();
            let rec = Reconstructor::new(&pts, t - 1, &mut rng).unwrap();
            let got = rec.reconstruct(&column(&rows, short, 0)).unwrap();
            assert_ne!(got, secret[0]);
            assert_eq!(
                Reconstructor::new(&pts, t, &mut rng).unwrap_err(),
                ShamirError::TooFewShares {
                    have: t - 1,
                    need: t
                }
            );
        }
    }

    #[test]
    fn works_with_more_than_255_shares() {
        let mut rng = ChaCha20Rng::seed_from_u64(4);
        let n = 300;
        let t = 200;
        let secret = [random_element(&mut rng)];
        let xs: Vec<u64> = (1..=n as u64).collect();
        let rows = split(&secret, t, &xs, &mut rng);
        let all: Vec<usize> = (0..n).collect();
        let rec = Reconstructor::new(&xs, t, &mut rng).unwrap();
        assert_eq!(rec.reconstruct(&column(&rows, &all, 0)).unwrap(), secret[0]);
        // The last t shares alone (points 101..=300) also suffice.
        let tail: Vec<usize> = (n - t..n).collect();
        let rec = Reconstructor::new(&xs[n - t..], t, &mut rng).unwrap();
        assert_eq!(
            rec.reconstruct(&column(&rows, &tail, 0)).unwrap(),
            secret[0]
        );
    }

    #[test]
    fn a_wrong_share_among_more_than_t_is_detected() {
        let mut rng = ChaCha20Rng::seed_from_u64(5);
        let n = 12;
        let t = 8;
        let secret = [random_element(&mut rng)];
        let xs: Vec<u64> = (1..=n as u64).collect();
        let rows = split(&secret, t, &xs, &mut rng);
        let all: Vec<usize> = (0..n).collect();
        let rec = Reconstructor::new(&xs, t, &mut rng).unwrap();
        for liar in 0..n {
            let mut ys = column(&rows, &all, 0);
            ys[liar] = add(ys[liar], 1);
            assert_eq!(rec.reconstruct(&ys), Err(ShamirError::Inconsistent));
        }
        assert_eq!(
            Reconstructor::new(&[1, 2, 2], 2, &mut rng).unwrap_err(),
            ShamirError::BadPoints
        );
    }
}
