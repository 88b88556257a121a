//! Random secrets and their stored form, shared by reviewer sessions, study
//! enrollment codes and device credentials.
//!
//! Every secret here is drawn from the thread-local CSPRNG (`rand::rng()`,
//! ChaCha12 seeded from the operating system) with at least 100 bits of
//! entropy, so the database keeps only a SHA-256 of it: a fast hash is enough
//! against guessing a random 100-bit value (common practice; slow password
//! hashes are for secrets people choose, see `review::accounts`).

use rand::{Rng, RngCore};
use sha2::{Digest, Sha256};

/// Lower-case hex of `bytes`.
pub fn hex(bytes: &[u8]) -> String {
    // By table rather than `write!("{b:02x}")`: this runs on every authenticated call, and the
    // formatting machinery took most of the time of hashing a presented secret.
    const DIGITS: &[u8; 16] = b"0123456789abcdef";
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push(DIGITS[usize::from(b >> 4)] as char);
        s.push(DIGITS[usize::from(b & 0x0f)] as char);
    }
    s
}

/// 32 random bytes, hex-encoded (64 characters, 256 bits).
pub fn random_token() -> String {
    let mut bytes = [0u8; 32];
    rand::rng().fill_bytes(&mut bytes);
    hex(&bytes)
}

/// The stored form of a secret: hex SHA-256 of its UTF-8 bytes.
pub fn secret_hash(secret: &str) -> String {
    hex(&Sha256::digest(secret.as_bytes()))
}

/// Equality that takes the same time wherever the strings differ.
pub fn constant_time_eq(a: &str, b: &str) -> bool {
    let (a, b) = (a.as_bytes(), b.as_bytes());
    a.len() == b.len() && a.iter().zip(b).fold(0u8, |acc, (x, y)| acc | (x ^ y)) == 0
}

/// `n` characters from an alphabet without look-alikes (54 symbols, about
/// 5.75 bits each).
pub fn random_readable(n: usize) -> String {
    const ALPHABET: &[u8] = b"abcdefghjkmnpqrstuvwxyzABCDEFGHJKMNPQRSTUVWXYZ23456789";
    let mut rng = rand::rng();
    (0..n)
        .map(|_| ALPHABET[rng.random_range(0..ALPHABET.len())] as char)
        .collect()
}

/// Symbols of enrollment codes: upper-case letters and digits without
/// look-alikes (no I, L, O, U, 0, 1), 30 symbols, about 4.9 bits each.
const CODE_ALPHABET: &[u8] = b"ABCDEFGHJKMNPQRSTVWXYZ23456789";

/// A new study enrollment code: four groups of five symbols joined by
/// hyphens, e.g. `7KQ2M-XH4TZ-…`, about 98 bits.
pub fn new_enrollment_code() -> String {
    let mut rng = rand::rng();
    let symbols: Vec<char> = (0..20)
        .map(|_| CODE_ALPHABET[rng.random_range(0..CODE_ALPHABET.len())] as char)
        .collect();
    symbols
        .chunks(5)
        .map(|c| c.iter().collect::<String>())
        .collect::<Vec<_>>()
        .join("-")
}

/// The form of an enrollment code that is hashed: hyphens and white space
/// dropped, letters upper-cased, so `7kq2m xh4tz` and `7KQ2M-XH4TZ` agree.
pub fn normalise_enrollment_code(code: &str) -> String {
    code.chars()
        .filter(|c| !c.is_whitespace() && *c != '-')
        .map(|c| c.to_ascii_uppercase())
        .collect()
}

/// The stored form of an enrollment code.
pub fn enrollment_code_hash(code: &str) -> String {
    secret_hash(&normalise_enrollment_code(code))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sha256_of_abc_matches_the_published_vector() {
        // FIPS 180-2, Appendix B.1 (SHA-256 of "abc").
        assert_eq!(
            secret_hash("abc"),
            "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
        );
    }

    #[test]
    fn enrollment_codes_compare_after_normalising() {
        let code = new_enrollment_code();
        assert_eq!(code.len(), 23, "{code}");
        assert!(
            code.chars()
                .all(|c| c == '-' || CODE_ALPHABET.contains(&(c as u8)))
        );
        let typed = code.replace('-', " ").to_lowercase();
        assert_eq!(enrollment_code_hash(&code), enrollment_code_hash(&typed));
        assert_ne!(
            enrollment_code_hash(&code),
            enrollment_code_hash(&new_enrollment_code())
        );
    }

    #[test]
    fn constant_time_eq_compares_whole_strings() {
        assert!(constant_time_eq("abc", "abc"));
        assert!(!constant_time_eq("abc", "abd"));
        assert!(!constant_time_eq("abc", "ab"));
    }
}
