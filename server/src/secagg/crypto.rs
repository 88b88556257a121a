//! Cryptographic primitives of secure aggregation: X25519 key pairs, HKDF-SHA256
//! key derivation, ChaCha20-Poly1305 share encryption, ChaCha20 mask expansion
//! and SHA-256 seed commitments.

use chacha20poly1305::aead::{Aead, Payload};
use chacha20poly1305::{ChaCha20Poly1305, KeyInit};
use hkdf::Hkdf;
use rand::{CryptoRng, RngCore, SeedableRng};
use rand_chacha::ChaCha20Rng;
use sha2::{Digest, Sha256};
use x25519_dalek::{PublicKey, StaticSecret};

/// Domain-separation prefix for every derivation and commitment.
const DOMAIN: &[u8] = b"plimsoll-secagg-v1";

/// Bytes of an X25519 public key.
pub const PUBLIC_KEY_BYTES: usize = 32;

/// Bytes of the Poly1305 authentication tag added to each ciphertext.
pub const TAG_BYTES: usize = 16;

/// An X25519 key pair. The secret is zeroised on drop by `x25519-dalek`.
pub struct KeyPair {
    /// The secret scalar.
    pub secret: StaticSecret,
    /// Its public key.
    pub public: [u8; PUBLIC_KEY_BYTES],
}

impl std::fmt::Debug for KeyPair {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("KeyPair")
            .field("public", &self.public)
            .finish_non_exhaustive()
    }
}

impl KeyPair {
    /// A fresh key pair from a cryptographically secure RNG.
    ///
    /// The secret bytes are clamped (RFC 7748) here rather than only inside
    /// X25519, so that bytes and scalar correspond one to one: a secret
    /// reconstructed from shares is then right exactly when it is clamped
    /// ([`is_clamped`]) and gives the advertised public key.
    pub fn generate<R: CryptoRng + ?Sized>(rng: &mut R) -> Self {
        let mut bytes = [0u8; 32];
        rng.fill_bytes(&mut bytes);
        bytes[0] &= 248;
        bytes[31] &= 127;
        bytes[31] |= 64;
        Self::from_secret_bytes(bytes)
    }

    /// The key pair of a secret given as bytes (clamped by X25519 on use).
    pub fn from_secret_bytes(bytes: [u8; 32]) -> Self {
        let secret = StaticSecret::from(bytes);
        let public = PublicKey::from(&secret).to_bytes();
        Self { secret, public }
    }
}

/// Whether secret bytes are in clamped form (see [`KeyPair::generate`]).
pub fn is_clamped(bytes: &[u8; 32]) -> bool {
    bytes[0] & 7 == 0 && bytes[31] & 0xc0 == 0x40
}

/// A fresh 32-byte seed from a cryptographically secure RNG.
pub fn random_seed<R: CryptoRng + ?Sized>(rng: &mut R) -> [u8; 32] {
    let mut seed = [0u8; 32];
    rng.fill_bytes(&mut seed);
    seed
}

/// X25519 agreement followed by HKDF-SHA256 with `info` = domain ‖ `label` ‖
/// `a` ‖ `b` (little-endian ids). `None` when the peer's key is of low order
/// (the agreement would be all zeros, a key anyone knows).
fn agree(secret: &StaticSecret, peer: &[u8; 32], label: &[u8], a: u64, b: u64) -> Option<[u8; 32]> {
    let shared = secret.diffie_hellman(&PublicKey::from(*peer));
    if !shared.was_contributory() {
        return None;
    }
    let hk = Hkdf::<Sha256>::new(Some(DOMAIN), shared.as_bytes());
    let mut info = Vec::with_capacity(label.len() + 16);
    info.extend_from_slice(label);
    info.extend_from_slice(&a.to_le_bytes());
    info.extend_from_slice(&b.to_le_bytes());
    let mut out = [0u8; 32];
    // 32 bytes is far below HKDF-SHA256's 8160-byte limit.
    hk.expand(&info, &mut out).ok()?;
    Some(out)
}

/// The AEAD key for the one message `sender` → `recipient`, from the
/// sender's c secret and the recipient's c public key (or the other way
/// round: X25519 is symmetric). Directional, so each key seals one message.
pub fn share_key(
    secret: &StaticSecret,
    peer: &[u8; 32],
    sender: u64,
    recipient: u64,
) -> Option<[u8; 32]> {
    agree(secret, peer, b"share-key", sender, recipient)
}

/// The pairwise mask seed s_{u,v}, identical for (u, v) and (v, u).
pub fn pair_seed(secret: &StaticSecret, peer: &[u8; 32], u: u64, v: u64) -> Option<[u8; 32]> {
    agree(secret, peer, b"pair-mask", u.min(v), u.max(v))
}

/// Associated data binding a ciphertext to its sender and recipient.
fn associated_data(sender: u64, recipient: u64) -> Vec<u8> {
    let mut ad = DOMAIN.to_vec();
    ad.extend_from_slice(&sender.to_le_bytes());
    ad.extend_from_slice(&recipient.to_le_bytes());
    ad
}

/// Encrypts `plaintext` from `sender` to `recipient` under `key`. The nonce is
/// fixed (zero) because [`share_key`] keys are per direction and per round.
pub fn seal(key: &[u8; 32], sender: u64, recipient: u64, plaintext: &[u8]) -> Option<Vec<u8>> {
    let cipher = ChaCha20Poly1305::new(key.into());
    let aad = associated_data(sender, recipient);
    cipher
        .encrypt(
            &[0u8; 12].into(),
            Payload {
                msg: plaintext,
                aad: &aad,
            },
        )
        .ok()
}

/// Decrypts and authenticates a [`seal`]ed message; `None` on failure.
pub fn open(key: &[u8; 32], sender: u64, recipient: u64, ciphertext: &[u8]) -> Option<Vec<u8>> {
    let cipher = ChaCha20Poly1305::new(key.into());
    let aad = associated_data(sender, recipient);
    cipher
        .decrypt(
            &[0u8; 12].into(),
            Payload {
                msg: ciphertext,
                aad: &aad,
            },
        )
        .ok()
}

/// Expands a seed into `len` pseudorandom ring elements (ChaCha20).
pub fn expand_mask(seed: &[u8; 32], len: usize) -> Vec<u64> {
    let mut prg = ChaCha20Rng::from_seed(*seed);
    (0..len).map(|_| prg.next_u64()).collect()
}

/// SHA-256 commitment to `owner`'s self-mask seed. The seed is 256 uniform
/// bits, so the hash reveals nothing useful about it.
pub fn commit_seed(owner: u64, seed: &[u8; 32]) -> [u8; 32] {
    let mut h = Sha256::new();
    h.update(DOMAIN);
    h.update(b"self-mask-commitment");
    h.update(owner.to_le_bytes());
    h.update(seed);
    h.finalize().into()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn agreement_is_symmetric_and_aead_binds_the_pair() {
        let mut rng = ChaCha20Rng::seed_from_u64(7);
        let a = KeyPair::generate(&mut rng);
        let b = KeyPair::generate(&mut rng);
        assert!(is_clamped(&a.secret.to_bytes()) && is_clamped(&b.secret.to_bytes()));
        assert_eq!(
            pair_seed(&a.secret, &b.public, 1, 2),
            pair_seed(&b.secret, &a.public, 2, 1)
        );
        let k_ab = share_key(&a.secret, &b.public, 1, 2).unwrap();
        assert_eq!(Some(k_ab), share_key(&b.secret, &a.public, 1, 2));
        assert_ne!(Some(k_ab), share_key(&a.secret, &b.public, 2, 1));
        let ct = seal(&k_ab, 1, 2, b"share").unwrap();
        assert_eq!(open(&k_ab, 1, 2, &ct).as_deref(), Some(&b"share"[..]));
        assert_eq!(open(&k_ab, 3, 2, &ct), None);
        let mut bad = ct.clone();
        bad[0] ^= 1;
        assert_eq!(open(&k_ab, 1, 2, &bad), None);
        // A low-order public key (all zeros) is refused.
        assert_eq!(share_key(&a.secret, &[0u8; 32], 1, 2), None);
    }
}
