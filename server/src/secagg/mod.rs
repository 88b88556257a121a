//! Secure aggregation: the server learns the sum of the devices' vectors and
//! nothing else about any single vector, following Bonawitz et al. 2017,
//! "Practical Secure Aggregation for Privacy-Preserving Machine Learning"
//! (ACM CCS 2017), in its honest-but-curious (semi-honest) version.
//!
//! This module is the pure protocol core: plain message types and functions
//! for both sides ([`Device`] and [`Server`]), with no transport, storage or
//! clock. A later change relays the messages over gRPC.
//!
//! # Phases
//! (Section numbers are from memory: the protocol is in §4 of the paper, the
//! semi-honest proof sketch in §6.1 and the active-adversary variant in §6.2.)
//!
//! 0. **AdvertiseKeys** — each device draws two X25519 key pairs, `c` (share
//!    encryption) and `s` (pairwise masks), and sends both public keys
//!    ([`AdvertiseKeys`]). The server broadcasts the set U1 ([`KeysBroadcast`]),
//!    which must hold at least t devices.
//! 1. **ShareKeys** — each device draws a self-mask seed b_u, Shamir-shares b_u
//!    and its `s` secret key t-of-|U1|, and for each other v in U1 encrypts
//!    (u, v, share of b_u, share of s_u) with ChaCha20-Poly1305 under a key
//!    derived (HKDF-SHA256) from X25519(c_u, c_v), with u and v in the
//!    associated data ([`ShareKeys`]). It also commits to b_u with SHA-256. The
//!    server relays each ciphertext to its recipient ([`SharesRelay`]); U2 =
//!    the senders.
//! 2. **MaskedInput** — each u in U2 sends y_u = x_u + PRG(b_u) +
//!    Σ_{v∈U2, v≠u} ±PRG(s_{u,v}) (+ if u < v, − otherwise), with s_{u,v} =
//!    HKDF(X25519(s_u, s_v)) and PRG = ChaCha20 ([`MaskedInput`]); U3 = senders.
//! 3. **Unmasking** — given U3 ([`UnmaskingRequest`]), each u in U3 decrypts
//!    its ciphertexts, checks the (u, v) inside, and returns the share of s_v
//!    for v ∈ U2 \ U3 and the share of b_v for v ∈ U3 ([`UnmaskingResponse`]).
//!    A device never reveals both shares of the same v, across requests too:
//!    that is the protocol's safety rule, refused with
//!    [`SecAggError::BothSharesRequested`]. U4 = responders, at least t.
//! 4. **Finish** — the server reconstructs b_v (v ∈ U3) and s_v (v ∈ U2 \ U3),
//!    removes PRG(b_v) and, for each dropped v, the pairwise masks s_{v,u} of
//!    every u ∈ U3, and outputs Σ_{u∈U3} x_u mod 2^64 ([`Server::finish`]).
//!
//! Inputs are vectors over Z_{2^64} (wrapping arithmetic); [`FixedPoint`]
//! encodes `f64` values and decodes their sum.
//!
//! # Threshold
//! The default t is n − ⌊n/3⌋ (at least 2) for n selected devices: the round
//! survives up to a third of them dropping, and t > n/2 so that two disjoint
//! groups can never both reach the threshold. [`RoundParams::with_threshold`]
//! sets another t in 2..=n.
//!
//! # Shares and detection of wrong shares
//! Shamir sharing is over GF(2^61 − 1), written in [`shamir`] (the small
//! GF(256) crates stop at 255 shares; see that module). A 32-byte secret is
//! shared as 5 field elements of 7 bytes. Device v's share is the polynomial
//! at x = 1 + (v's position in sorted U1).
//!
//! A device sending a wrong share in phase 3 never yields a wrong sum:
//! - with more than t shares of a secret, the server checks that all of them
//!   lie on one polynomial of degree t − 1 (a random linear combination of the
//!   surplus shares against the interpolation of the first t, false accept
//!   probability 2^−61);
//! - whatever the count, a reconstructed `s` secret key must be in clamped
//!   form (keys are clamped before sharing, so no share error can hide in the
//!   bits X25519 ignores) and give the public key advertised in phase 0, and a reconstructed b_u must match the
//!   SHA-256 commitment sent in phase 1.
//!
//! Any failure ends the round with [`SecAggError::InconsistentShares`] naming
//! the secret's owner. (The liar itself is not identified: the round fails
//! safely instead of trying subsets.)
//!
//! # Threat model
//! Covered: an honest-but-curious server that follows the protocol but tries
//! to learn individual inputs, colluding with at most t − 1 devices; devices
//! honest-but-curious towards each other. Such a coalition learns nothing
//! about the inputs of the others beyond their sum. Share ciphertexts are
//! authenticated, so the relaying server cannot read or alter them unnoticed.
//!
//! Not covered:
//! - an active (malicious) server: without signatures on the advertised keys
//!   and a consistency round (§6.2 of the paper, from memory) it can, e.g.,
//!   substitute keys or tell devices different U3 sets;
//! - Sybil devices: the server or an attacker enrolling many devices reaches
//!   t by itself; enrolment must keep this out;
//! - what the output itself reveals: the server learns the sum and which
//!   devices took part (U1..U4), and a sum over few devices may reveal much;
//! - robust aggregation: a trimmed mean, median or norm clipping on the
//!   server cannot run on masked inputs; only linear aggregates (sums,
//!   weighted sums with device-side weights) are possible. Clipping must run
//!   on the device.
//!
//! # Message sizes per device
//! For n devices in the round, vector length L, payload bytes only (no
//! framing), with no drops ([`message_bytes`]):
//! - sent: AdvertiseKeys 8 + 64 = 72; ShareKeys 8 + 32 + (n − 1) · 128 (ids
//!   16 + ciphertext 96 + tag 16); MaskedInput 8 + 8L; Unmasking 8 + 49n
//!   (owner 8 + kind 1 + 5 limbs · 8 per share);
//! - received: KeysBroadcast 72n; SharesRelay 8n + (n − 1) · 128;
//!   UnmaskingRequest 8n.
//!
//! The mask vector dominates for large L; the share traffic grows as O(n) per
//! device and O(n²) at the server.

pub mod crypto;
pub mod fixed;
pub mod shamir;

#[cfg(test)]
mod tests;

use std::collections::{BTreeMap, BTreeSet};

use rand::CryptoRng;

pub use fixed::FixedPoint;
use shamir::{LIMBS, Reconstructor, ShamirError};

use crypto::KeyPair;

/// Bytes of a device id on the wire.
const ID_BYTES: usize = 8;
/// Bytes of a share's plaintext: sender, recipient, b limbs, s limbs.
pub const SHARE_PLAINTEXT_BYTES: usize = 2 * ID_BYTES + 2 * 8 * LIMBS;
/// Bytes of an encrypted share: plaintext plus the AEAD tag.
pub const SHARE_CIPHERTEXT_BYTES: usize = SHARE_PLAINTEXT_BYTES + crypto::TAG_BYTES;

/// The protocol phases, for error messages.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Phase {
    /// Phase 0: public keys.
    AdvertiseKeys,
    /// Phase 1: encrypted shares.
    ShareKeys,
    /// Phase 2: masked inputs.
    MaskedInput,
    /// Phase 3: revealed shares.
    Unmasking,
    /// The server's reconstruction.
    Finish,
}

impl std::fmt::Display for Phase {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let name = match self {
            Self::AdvertiseKeys => "AdvertiseKeys",
            Self::ShareKeys => "ShareKeys",
            Self::MaskedInput => "MaskedInput",
            Self::Unmasking => "Unmasking",
            Self::Finish => "Finish",
        };
        f.write_str(name)
    }
}

/// Which of a device's two shared secrets a share belongs to.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum SecretKind {
    /// The self-mask seed b_u.
    SelfMask,
    /// The pairwise-mask secret key s_u.
    PairwiseKey,
}

impl std::fmt::Display for SecretKind {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Self::SelfMask => "self-mask seed",
            Self::PairwiseKey => "pairwise-mask key",
        })
    }
}

/// Everything that can go wrong; each names the phase, device or index.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum SecAggError {
    /// Fewer devices than the threshold remain.
    #[error("secure aggregation {phase}: {have} devices, at least {need} needed")]
    TooFewDevices {
        /// Phase at which the count fell short.
        phase: Phase,
        /// Devices available.
        have: usize,
        /// Threshold t.
        need: usize,
    },
    /// Round parameters or a codec are invalid.
    #[error("invalid secure aggregation parameters: {0}")]
    InvalidParams(String),
    /// A message arrived out of order.
    #[error("secure aggregation: {what} in phase {phase}")]
    WrongPhase {
        /// Current phase.
        phase: Phase,
        /// What was attempted.
        what: &'static str,
    },
    /// A message came from, or named, a device not allowed at this point.
    #[error("secure aggregation {phase}: device {device} is not expected here")]
    UnexpectedDevice {
        /// Phase.
        phase: Phase,
        /// The device.
        device: u64,
    },
    /// A device sent a second message in one phase.
    #[error("secure aggregation {phase}: duplicate message from device {device}")]
    Duplicate {
        /// Phase.
        phase: Phase,
        /// The device.
        device: u64,
    },
    /// A message is malformed (wrong length, missing or extra entries).
    #[error("secure aggregation {phase}: malformed message from device {device}: {reason}")]
    Malformed {
        /// Phase.
        phase: Phase,
        /// Sender.
        device: u64,
        /// What is wrong.
        reason: String,
    },
    /// A public key is of low order (key agreement would be predictable).
    #[error("secure aggregation: device {device} advertised a weak public key")]
    WeakKey {
        /// Owner of the key.
        device: u64,
    },
    /// A share ciphertext failed authentication.
    #[error("share sent by device {sender} to device {recipient} failed authentication")]
    ShareAuthentication {
        /// Sender.
        sender: u64,
        /// Recipient.
        recipient: u64,
    },
    /// A decrypted share names the wrong pair.
    #[error(
        "share sent by device {sender} to device {recipient} names the pair \
         ({claimed_sender}, {claimed_recipient})"
    )]
    ShareMismatch {
        /// Sender.
        sender: u64,
        /// Recipient.
        recipient: u64,
        /// Sender named inside.
        claimed_sender: u64,
        /// Recipient named inside.
        claimed_recipient: u64,
    },
    /// The server asked a device for both shares of one peer.
    #[error(
        "device {device} refuses: revealing the {kind} share of device {peer} after the \
         other share of that device was revealed would unmask its input"
    )]
    BothSharesRequested {
        /// The refusing device.
        device: u64,
        /// The peer whose shares were asked for.
        peer: u64,
        /// The share now asked for.
        kind: SecretKind,
    },
    /// Shares of a secret do not reconstruct consistently.
    #[error("shares of device {owner}'s {kind} are inconsistent: {reason}; the round fails")]
    InconsistentShares {
        /// Owner of the secret.
        owner: u64,
        /// Which secret.
        kind: SecretKind,
        /// Which check failed.
        reason: &'static str,
    },
    /// An input value is not finite.
    #[error("value at index {index} is not finite")]
    NonFinite {
        /// Index in the vector.
        index: usize,
    },
    /// An input value is outside the codec's range.
    #[error("value {value} at index {index} is outside ±{limit}")]
    OutOfRange {
        /// Index in the vector.
        index: usize,
        /// The value.
        value: f64,
        /// The codec's limit.
        limit: f64,
    },
}

/// The parameters of one round, known to the server and every device.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RoundParams {
    devices: Vec<u64>,
    threshold: usize,
    vector_len: usize,
}

impl RoundParams {
    /// Parameters for the selected `devices` with the default threshold
    /// t = n − ⌊n/3⌋ (at least 2).
    ///
    /// # Errors
    /// [`SecAggError::InvalidParams`] for fewer than 2 devices, a repeated id
    /// or an empty vector.
    pub fn new(devices: &[u64], vector_len: usize) -> Result<Self, SecAggError> {
        let n = devices.len();
        Self::with_threshold(devices, vector_len, default_threshold(n))
    }

    /// Parameters with an explicit threshold in 2..=n.
    ///
    /// # Errors
    /// As [`RoundParams::new`], and for a threshold out of range.
    pub fn with_threshold(
        devices: &[u64],
        vector_len: usize,
        threshold: usize,
    ) -> Result<Self, SecAggError> {
        let mut sorted = devices.to_vec();
        sorted.sort_unstable();
        sorted.dedup();
        if sorted.len() != devices.len() {
            return Err(SecAggError::InvalidParams("repeated device id".into()));
        }
        let n = sorted.len();
        if n < 2 || vector_len == 0 {
            return Err(SecAggError::InvalidParams(format!(
                "need at least 2 devices and a non-empty vector (got {n} devices, length {vector_len})"
            )));
        }
        if !(2..=n).contains(&threshold) {
            return Err(SecAggError::InvalidParams(format!(
                "threshold {threshold} outside 2..={n}"
            )));
        }
        Ok(Self {
            devices: sorted,
            threshold,
            vector_len,
        })
    }

    /// The selected devices, sorted.
    pub fn devices(&self) -> &[u64] {
        &self.devices
    }

    /// The threshold t.
    pub fn threshold(&self) -> usize {
        self.threshold
    }

    /// The vector length.
    pub fn vector_len(&self) -> usize {
        self.vector_len
    }

    /// Fails unless `have` ≥ t.
    fn require(&self, phase: Phase, have: usize) -> Result<(), SecAggError> {
        if have < self.threshold {
            return Err(SecAggError::TooFewDevices {
                phase,
                have,
                need: self.threshold,
            });
        }
        Ok(())
    }
}

/// The default threshold: t = n − ⌊n/3⌋, at least 2.
pub fn default_threshold(n: usize) -> usize {
    (n - n / 3).max(2)
}

/// Phase 0, device → server: the device's two public keys.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct AdvertiseKeys {
    /// Sender.
    pub device: u64,
    /// Public key for share encryption.
    pub c_public: [u8; 32],
    /// Public key for pairwise masks.
    pub s_public: [u8; 32],
}

/// Phase 0, server → devices: the keys of U1, sorted by device.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct KeysBroadcast {
    /// U1's advertisements.
    pub keys: Vec<AdvertiseKeys>,
}

/// One encrypted pair of shares from `sender` to `recipient`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct EncryptedShare {
    /// Owner of the shared secrets.
    pub sender: u64,
    /// Holder of the shares.
    pub recipient: u64,
    /// ChaCha20-Poly1305 ciphertext of (sender, recipient, b share, s share).
    pub ciphertext: Vec<u8>,
}

/// Phase 1, device → server.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct ShareKeys {
    /// Sender.
    pub device: u64,
    /// SHA-256 commitment to the self-mask seed b_u.
    pub b_commitment: [u8; 32],
    /// One ciphertext per other device of U1.
    pub shares: Vec<EncryptedShare>,
}

/// Phase 1, server → one device: U2 and the ciphertexts addressed to it.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct SharesRelay {
    /// The devices that sent shares, sorted.
    pub u2: Vec<u64>,
    /// Ciphertexts for this recipient, one per other member of U2.
    pub shares: Vec<EncryptedShare>,
}

/// Phase 2, device → server: the masked input y_u.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct MaskedInput {
    /// Sender.
    pub device: u64,
    /// y_u.
    pub masked: Vec<u64>,
}

/// Phase 3, server → devices of U3.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UnmaskingRequest {
    /// The devices whose masked input arrived, sorted.
    pub u3: Vec<u64>,
}

/// One revealed share: the holder's share of `owner`'s secret `kind`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RevealedShare {
    /// Owner of the secret.
    pub owner: u64,
    /// Which secret.
    pub kind: SecretKind,
    /// The share, one field element per limb.
    pub share: [u64; LIMBS],
}

/// Phase 3, device → server.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct UnmaskingResponse {
    /// Sender.
    pub device: u64,
    /// b shares for U3, s shares for U2 \ U3.
    pub shares: Vec<RevealedShare>,
}

/// Per-device payload bytes of one round without drops.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct MessageBytes {
    /// Bytes the device sends.
    pub sent: usize,
    /// Bytes the device receives.
    pub received: usize,
}

/// Payload bytes per device for `n` devices and vectors of length `len`
/// (formulas in the module docs).
pub fn message_bytes(n: usize, len: usize) -> MessageBytes {
    let advertise = ID_BYTES + 2 * crypto::PUBLIC_KEY_BYTES;
    let encrypted_share = 2 * ID_BYTES + SHARE_CIPHERTEXT_BYTES;
    let share_keys = ID_BYTES + 32 + n.saturating_sub(1) * encrypted_share;
    let masked = ID_BYTES + 8 * len;
    let revealed = ID_BYTES + 1 + 8 * LIMBS;
    let unmasking = ID_BYTES + n * revealed;
    let broadcast = n * advertise;
    let relay = ID_BYTES * n + n.saturating_sub(1) * encrypted_share;
    let request = ID_BYTES * n;
    MessageBytes {
        sent: advertise + share_keys + masked + unmasking,
        received: broadcast + relay + request,
    }
}

/// Shamir evaluation point of the device at `position` in sorted U1.
fn share_point(position: usize) -> u64 {
    position as u64 + 1
}

/// Adds `mask` into `acc` (wrapping), or subtracts it when `negate`.
fn apply_mask(acc: &mut [u64], mask: &[u64], negate: bool) {
    for (a, m) in acc.iter_mut().zip(mask) {
        *a = if negate {
            a.wrapping_sub(*m)
        } else {
            a.wrapping_add(*m)
        };
    }
}

/// Serialises a share plaintext.
fn encode_share(sender: u64, recipient: u64, b: &[u64], s: &[u64]) -> Vec<u8> {
    let mut out = Vec::with_capacity(SHARE_PLAINTEXT_BYTES);
    out.extend_from_slice(&sender.to_le_bytes());
    out.extend_from_slice(&recipient.to_le_bytes());
    for limb in b.iter().chain(s) {
        out.extend_from_slice(&limb.to_le_bytes());
    }
    out
}

/// A decrypted share plaintext.
struct SharePlain {
    sender: u64,
    recipient: u64,
    b: [u64; LIMBS],
    s: [u64; LIMBS],
}

/// Parses a share plaintext; `None` if its length is wrong.
fn decode_share(bytes: &[u8]) -> Option<SharePlain> {
    if bytes.len() != SHARE_PLAINTEXT_BYTES {
        return None;
    }
    let words: Vec<u64> = bytes
        .chunks_exact(8)
        .map(|c| {
            let mut w = [0u8; 8];
            w.copy_from_slice(c);
            u64::from_le_bytes(w)
        })
        .collect();
    let mut b = [0u64; LIMBS];
    let mut s = [0u64; LIMBS];
    b.copy_from_slice(words.get(2..2 + LIMBS)?);
    s.copy_from_slice(words.get(2 + LIMBS..2 + 2 * LIMBS)?);
    Some(SharePlain {
        sender: *words.first()?,
        recipient: *words.get(1)?,
        b,
        s,
    })
}

/// Checks that `ids` is sorted, unique and within `allowed`.
fn check_subset(
    phase: Phase,
    ids: &[u64],
    allowed: &BTreeSet<u64>,
) -> Result<BTreeSet<u64>, SecAggError> {
    let mut set = BTreeSet::new();
    for &id in ids {
        if !allowed.contains(&id) {
            return Err(SecAggError::UnexpectedDevice { phase, device: id });
        }
        if !set.insert(id) {
            return Err(SecAggError::Duplicate { phase, device: id });
        }
    }
    Ok(set)
}

/// The device side of one round. Holds the round's secrets; create a new one
/// per round (keys must never be reused across rounds).
pub struct Device {
    id: u64,
    params: RoundParams,
    c: KeyPair,
    s: KeyPair,
    /// U1's advertised keys, after phase 1.
    u1: BTreeMap<u64, AdvertiseKeys>,
    /// b_u, after phase 1.
    b_seed: Option<[u8; 32]>,
    /// This device's own shares of b_u and s_u.
    own_share: Option<([u64; LIMBS], [u64; LIMBS])>,
    /// U2, after phase 2.
    u2: BTreeSet<u64>,
    /// Ciphertexts received, by sender.
    received: BTreeMap<u64, EncryptedShare>,
    /// Whether the masked input was sent.
    masked_sent: bool,
    /// Peers whose b share was revealed.
    revealed_b: BTreeSet<u64>,
    /// Peers whose s share was revealed.
    revealed_s: BTreeSet<u64>,
}

impl std::fmt::Debug for Device {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Device")
            .field("id", &self.id)
            .field("u1", &self.u1.len())
            .field("u2", &self.u2.len())
            .finish_non_exhaustive()
    }
}

impl Device {
    /// Phase 0: joins the round and advertises two fresh public keys.
    ///
    /// # Errors
    /// [`SecAggError::UnexpectedDevice`] if `id` is not selected.
    pub fn new<R: CryptoRng + ?Sized>(
        id: u64,
        params: RoundParams,
        rng: &mut R,
    ) -> Result<(Self, AdvertiseKeys), SecAggError> {
        if params.devices.binary_search(&id).is_err() {
            return Err(SecAggError::UnexpectedDevice {
                phase: Phase::AdvertiseKeys,
                device: id,
            });
        }
        let c = KeyPair::generate(rng);
        let s = KeyPair::generate(rng);
        let msg = AdvertiseKeys {
            device: id,
            c_public: c.public,
            s_public: s.public,
        };
        let device = Self {
            id,
            params,
            c,
            s,
            u1: BTreeMap::new(),
            b_seed: None,
            own_share: None,
            u2: BTreeSet::new(),
            received: BTreeMap::new(),
            masked_sent: false,
            revealed_b: BTreeSet::new(),
            revealed_s: BTreeSet::new(),
        };
        Ok((device, msg))
    }

    /// This device's id.
    pub fn id(&self) -> u64 {
        self.id
    }

    /// Phase 1: shares b_u and s_u among U1 and encrypts each pair of shares.
    ///
    /// # Errors
    /// Too few devices in U1, an unknown or repeated device, this device
    /// missing or with other keys, a weak key, or a repeated call.
    pub fn share_keys<R: CryptoRng + ?Sized>(
        &mut self,
        broadcast: &KeysBroadcast,
        rng: &mut R,
    ) -> Result<ShareKeys, SecAggError> {
        const PHASE: Phase = Phase::ShareKeys;
        if self.b_seed.is_some() {
            return Err(SecAggError::WrongPhase {
                phase: PHASE,
                what: "second ShareKeys",
            });
        }
        let selected: BTreeSet<u64> = self.params.devices.iter().copied().collect();
        let ids: Vec<u64> = broadcast.keys.iter().map(|k| k.device).collect();
        check_subset(PHASE, &ids, &selected)?;
        self.params.require(PHASE, ids.len())?;
        let u1: BTreeMap<u64, AdvertiseKeys> = broadcast
            .keys
            .iter()
            .map(|k| (k.device, k.clone()))
            .collect();
        match u1.get(&self.id) {
            Some(mine) if mine.c_public == self.c.public && mine.s_public == self.s.public => {}
            _ => {
                return Err(SecAggError::UnexpectedDevice {
                    phase: PHASE,
                    device: self.id,
                });
            }
        }
        let b_seed = crypto::random_seed(rng);
        let xs: Vec<u64> = (0..u1.len()).map(share_point).collect();
        let t = self.params.threshold;
        let b_rows = shamir::split(&shamir::secret_to_limbs(&b_seed), t, &xs, rng);
        let s_rows = shamir::split(
            &shamir::secret_to_limbs(&self.s.secret.to_bytes()),
            t,
            &xs,
            rng,
        );
        let mut shares = Vec::with_capacity(u1.len().saturating_sub(1));
        for ((&v, keys), (b_row, s_row)) in u1.iter().zip(b_rows.iter().zip(&s_rows)) {
            if v == self.id {
                let mut b = [0u64; LIMBS];
                let mut s = [0u64; LIMBS];
                b.copy_from_slice(b_row);
                s.copy_from_slice(s_row);
                self.own_share = Some((b, s));
                continue;
            }
            let key = crypto::share_key(&self.c.secret, &keys.c_public, self.id, v)
                .ok_or(SecAggError::WeakKey { device: v })?;
            let plaintext = encode_share(self.id, v, b_row, s_row);
            let ciphertext = crypto::seal(&key, self.id, v, &plaintext).ok_or_else(|| {
                SecAggError::Malformed {
                    phase: PHASE,
                    device: self.id,
                    reason: "encryption failed".into(),
                }
            })?;
            shares.push(EncryptedShare {
                sender: self.id,
                recipient: v,
                ciphertext,
            });
        }
        self.u1 = u1;
        self.b_seed = Some(b_seed);
        Ok(ShareKeys {
            device: self.id,
            b_commitment: crypto::commit_seed(self.id, &b_seed),
            shares,
        })
    }

    /// Phase 2: stores the relayed ciphertexts and masks `input`.
    ///
    /// # Errors
    /// Wrong phase, wrong input length, too few devices in U2, U2 not within
    /// U1 or without this device, missing, extra or misaddressed ciphertexts,
    /// or a weak key.
    pub fn masked_input(
        &mut self,
        relay: &SharesRelay,
        input: &[u64],
    ) -> Result<MaskedInput, SecAggError> {
        const PHASE: Phase = Phase::MaskedInput;
        let b_seed = match self.b_seed {
            Some(seed) if !self.masked_sent => seed,
            _ => {
                return Err(SecAggError::WrongPhase {
                    phase: PHASE,
                    what: "MaskedInput before ShareKeys or twice",
                });
            }
        };
        if input.len() != self.params.vector_len {
            return Err(SecAggError::Malformed {
                phase: PHASE,
                device: self.id,
                reason: format!(
                    "input length {} instead of {}",
                    input.len(),
                    self.params.vector_len
                ),
            });
        }
        let u1: BTreeSet<u64> = self.u1.keys().copied().collect();
        let u2 = check_subset(PHASE, &relay.u2, &u1)?;
        self.params.require(PHASE, u2.len())?;
        if !u2.contains(&self.id) {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device: self.id,
            });
        }
        let mut received = BTreeMap::new();
        for share in &relay.shares {
            if share.recipient != self.id || share.sender == self.id || !u2.contains(&share.sender)
            {
                return Err(SecAggError::UnexpectedDevice {
                    phase: PHASE,
                    device: share.sender,
                });
            }
            if received.insert(share.sender, share.clone()).is_some() {
                return Err(SecAggError::Duplicate {
                    phase: PHASE,
                    device: share.sender,
                });
            }
        }
        if let Some(&missing) = u2
            .iter()
            .find(|&&v| v != self.id && !received.contains_key(&v))
        {
            return Err(SecAggError::Malformed {
                phase: PHASE,
                device: missing,
                reason: format!("no share relayed to device {}", self.id),
            });
        }
        let len = self.params.vector_len;
        let mut y = input.to_vec();
        apply_mask(&mut y, &crypto::expand_mask(&b_seed, len), false);
        for &v in u2.iter().filter(|&&v| v != self.id) {
            let peer = self.u1.get(&v).ok_or(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device: v,
            })?;
            let seed = crypto::pair_seed(&self.s.secret, &peer.s_public, self.id, v)
                .ok_or(SecAggError::WeakKey { device: v })?;
            apply_mask(&mut y, &crypto::expand_mask(&seed, len), self.id > v);
        }
        self.u2 = u2;
        self.received = received;
        self.masked_sent = true;
        Ok(MaskedInput {
            device: self.id,
            masked: y,
        })
    }

    /// Phase 3: reveals b shares of U3 and s shares of U2 \ U3.
    ///
    /// Refuses ([`SecAggError::BothSharesRequested`]) to reveal a share of a
    /// peer whose other share it has already revealed, in this or an earlier
    /// request; the refusal reveals nothing.
    ///
    /// # Errors
    /// Wrong phase, U3 not within U2 or without this device, too few devices
    /// in U3, a ciphertext failing authentication or naming the wrong pair
    /// (naming its sender), or the safety rule above.
    pub fn unmask(&mut self, request: &UnmaskingRequest) -> Result<UnmaskingResponse, SecAggError> {
        const PHASE: Phase = Phase::Unmasking;
        if !self.masked_sent {
            return Err(SecAggError::WrongPhase {
                phase: PHASE,
                what: "Unmasking before MaskedInput",
            });
        }
        let u3 = check_subset(PHASE, &request.u3, &self.u2)?;
        self.params.require(PHASE, u3.len())?;
        if !u3.contains(&self.id) {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device: self.id,
            });
        }
        // Safety rule first, before anything is decrypted or revealed.
        for &v in &self.u2 {
            let (kind, other_revealed) = if u3.contains(&v) {
                (SecretKind::SelfMask, self.revealed_s.contains(&v))
            } else {
                (SecretKind::PairwiseKey, self.revealed_b.contains(&v))
            };
            if other_revealed {
                return Err(SecAggError::BothSharesRequested {
                    device: self.id,
                    peer: v,
                    kind,
                });
            }
        }
        let (own_b, own_s) = self.own_share.ok_or(SecAggError::WrongPhase {
            phase: PHASE,
            what: "Unmasking without own share",
        })?;
        let mut shares = Vec::with_capacity(self.u2.len());
        for &v in &self.u2 {
            let (b, s) = if v == self.id {
                (own_b, own_s)
            } else {
                let plain = self.decrypt_from(v)?;
                (plain.b, plain.s)
            };
            let (kind, share) = if u3.contains(&v) {
                (SecretKind::SelfMask, b)
            } else {
                (SecretKind::PairwiseKey, s)
            };
            shares.push(RevealedShare {
                owner: v,
                kind,
                share,
            });
        }
        for share in &shares {
            match share.kind {
                SecretKind::SelfMask => self.revealed_b.insert(share.owner),
                SecretKind::PairwiseKey => self.revealed_s.insert(share.owner),
            };
        }
        Ok(UnmaskingResponse {
            device: self.id,
            shares,
        })
    }

    /// Decrypts and checks the ciphertext received from `sender`.
    fn decrypt_from(&self, sender: u64) -> Result<SharePlain, SecAggError> {
        let auth_err = SecAggError::ShareAuthentication {
            sender,
            recipient: self.id,
        };
        let share = self.received.get(&sender).ok_or(auth_err.clone())?;
        let keys = self.u1.get(&sender).ok_or(auth_err.clone())?;
        let key = crypto::share_key(&self.c.secret, &keys.c_public, sender, self.id)
            .ok_or(SecAggError::WeakKey { device: sender })?;
        let bytes =
            crypto::open(&key, sender, self.id, &share.ciphertext).ok_or(auth_err.clone())?;
        let plain = decode_share(&bytes).ok_or(auth_err)?;
        if plain.sender != sender || plain.recipient != self.id {
            return Err(SecAggError::ShareMismatch {
                sender,
                recipient: self.id,
                claimed_sender: plain.sender,
                claimed_recipient: plain.recipient,
            });
        }
        Ok(plain)
    }
}

/// Where the server is in the round.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum ServerState {
    Advertise,
    Sharing,
    Masking,
    Unmasking,
    Done,
}

/// The server side of one round: collects messages phase by phase and
/// computes the sum. Each `receive_*` validates one message; each `close_*`
/// ends a phase and fails if fewer than t devices took part.
#[derive(Debug)]
pub struct Server {
    params: RoundParams,
    state: ServerState,
    keys: BTreeMap<u64, AdvertiseKeys>,
    shares: BTreeMap<u64, ShareKeys>,
    masked: BTreeMap<u64, Vec<u64>>,
    responses: BTreeMap<u64, UnmaskingResponse>,
}

impl Server {
    /// A server for one round.
    pub fn new(params: RoundParams) -> Self {
        Self {
            params,
            state: ServerState::Advertise,
            keys: BTreeMap::new(),
            shares: BTreeMap::new(),
            masked: BTreeMap::new(),
            responses: BTreeMap::new(),
        }
    }

    /// Fails unless the server is in `state`.
    fn expect(
        &self,
        state: ServerState,
        phase: Phase,
        what: &'static str,
    ) -> Result<(), SecAggError> {
        if self.state != state {
            return Err(SecAggError::WrongPhase { phase, what });
        }
        Ok(())
    }

    /// Phase 0: accepts one device's public keys.
    ///
    /// # Errors
    /// Wrong phase, unselected or repeated device.
    pub fn receive_keys(&mut self, msg: AdvertiseKeys) -> Result<(), SecAggError> {
        const PHASE: Phase = Phase::AdvertiseKeys;
        self.expect(
            ServerState::Advertise,
            PHASE,
            "keys after AdvertiseKeys closed",
        )?;
        if self.params.devices.binary_search(&msg.device).is_err() {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device: msg.device,
            });
        }
        if self.keys.contains_key(&msg.device) {
            return Err(SecAggError::Duplicate {
                phase: PHASE,
                device: msg.device,
            });
        }
        self.keys.insert(msg.device, msg);
        Ok(())
    }

    /// Ends phase 0: U1 = devices that advertised.
    ///
    /// # Errors
    /// Wrong phase or |U1| < t.
    pub fn close_advertise(&mut self) -> Result<KeysBroadcast, SecAggError> {
        self.expect(
            ServerState::Advertise,
            Phase::AdvertiseKeys,
            "closing twice",
        )?;
        self.params.require(Phase::AdvertiseKeys, self.keys.len())?;
        self.state = ServerState::Sharing;
        Ok(KeysBroadcast {
            keys: self.keys.values().cloned().collect(),
        })
    }

    /// Phase 1: accepts one device's encrypted shares.
    ///
    /// # Errors
    /// Wrong phase, a sender not in U1 or repeated, or ciphertexts that are
    /// not exactly one per other member of U1 from this sender.
    pub fn receive_shares(&mut self, msg: ShareKeys) -> Result<(), SecAggError> {
        const PHASE: Phase = Phase::ShareKeys;
        self.expect(ServerState::Sharing, PHASE, "shares outside ShareKeys")?;
        let device = msg.device;
        if !self.keys.contains_key(&device) {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device,
            });
        }
        if self.shares.contains_key(&device) {
            return Err(SecAggError::Duplicate {
                phase: PHASE,
                device,
            });
        }
        let mut recipients = BTreeSet::new();
        for share in &msg.shares {
            let ok = share.sender == device
                && share.recipient != device
                && self.keys.contains_key(&share.recipient)
                && share.ciphertext.len() == SHARE_CIPHERTEXT_BYTES
                && recipients.insert(share.recipient);
            if !ok {
                return Err(SecAggError::Malformed {
                    phase: PHASE,
                    device,
                    reason: format!("bad ciphertext for device {}", share.recipient),
                });
            }
        }
        if recipients.len() + 1 != self.keys.len() {
            return Err(SecAggError::Malformed {
                phase: PHASE,
                device,
                reason: format!(
                    "{} ciphertexts for {} other devices",
                    recipients.len(),
                    self.keys.len() - 1
                ),
            });
        }
        self.shares.insert(device, msg);
        Ok(())
    }

    /// Ends phase 1: U2 = devices that sent shares; returns each member's
    /// relay (U2 and the ciphertexts addressed to it).
    ///
    /// # Errors
    /// Wrong phase or |U2| < t.
    pub fn close_sharing(&mut self) -> Result<BTreeMap<u64, SharesRelay>, SecAggError> {
        self.expect(ServerState::Sharing, Phase::ShareKeys, "closing twice")?;
        self.params.require(Phase::ShareKeys, self.shares.len())?;
        let u2: Vec<u64> = self.shares.keys().copied().collect();
        let mut relays: BTreeMap<u64, SharesRelay> = u2
            .iter()
            .map(|&u| {
                (
                    u,
                    SharesRelay {
                        u2: u2.clone(),
                        shares: Vec::new(),
                    },
                )
            })
            .collect();
        for msg in self.shares.values() {
            for share in &msg.shares {
                if let Some(relay) = relays.get_mut(&share.recipient) {
                    relay.shares.push(share.clone());
                }
            }
        }
        self.state = ServerState::Masking;
        Ok(relays)
    }

    /// Phase 2: accepts one masked input.
    ///
    /// # Errors
    /// Wrong phase, a sender not in U2 or repeated, or a wrong length.
    pub fn receive_masked(&mut self, msg: MaskedInput) -> Result<(), SecAggError> {
        const PHASE: Phase = Phase::MaskedInput;
        self.expect(
            ServerState::Masking,
            PHASE,
            "masked input outside MaskedInput",
        )?;
        let device = msg.device;
        if !self.shares.contains_key(&device) {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device,
            });
        }
        if self.masked.contains_key(&device) {
            return Err(SecAggError::Duplicate {
                phase: PHASE,
                device,
            });
        }
        if msg.masked.len() != self.params.vector_len {
            return Err(SecAggError::Malformed {
                phase: PHASE,
                device,
                reason: format!(
                    "length {} instead of {}",
                    msg.masked.len(),
                    self.params.vector_len
                ),
            });
        }
        self.masked.insert(device, msg.masked);
        Ok(())
    }

    /// Ends phase 2: U3 = devices whose masked input arrived.
    ///
    /// # Errors
    /// Wrong phase or |U3| < t.
    pub fn close_masking(&mut self) -> Result<UnmaskingRequest, SecAggError> {
        self.expect(ServerState::Masking, Phase::MaskedInput, "closing twice")?;
        self.params.require(Phase::MaskedInput, self.masked.len())?;
        self.state = ServerState::Unmasking;
        Ok(UnmaskingRequest {
            u3: self.masked.keys().copied().collect(),
        })
    }

    /// Phase 3: accepts one device's revealed shares.
    ///
    /// # Errors
    /// Wrong phase, a sender not in U3 or repeated, or shares that are not
    /// exactly a b share per member of U3 and an s share per member of
    /// U2 \ U3.
    pub fn receive_unmasking(&mut self, msg: UnmaskingResponse) -> Result<(), SecAggError> {
        const PHASE: Phase = Phase::Unmasking;
        self.expect(ServerState::Unmasking, PHASE, "shares outside Unmasking")?;
        let device = msg.device;
        if !self.masked.contains_key(&device) {
            return Err(SecAggError::UnexpectedDevice {
                phase: PHASE,
                device,
            });
        }
        if self.responses.contains_key(&device) {
            return Err(SecAggError::Duplicate {
                phase: PHASE,
                device,
            });
        }
        let mut seen = BTreeSet::new();
        for share in &msg.shares {
            let expected = if self.masked.contains_key(&share.owner) {
                SecretKind::SelfMask
            } else {
                SecretKind::PairwiseKey
            };
            let ok = self.shares.contains_key(&share.owner)
                && share.kind == expected
                && share.share.iter().all(|&y| y < shamir::P)
                && seen.insert(share.owner);
            if !ok {
                return Err(SecAggError::Malformed {
                    phase: PHASE,
                    device,
                    reason: format!("bad share of device {}", share.owner),
                });
            }
        }
        if seen.len() != self.shares.len() {
            return Err(SecAggError::Malformed {
                phase: PHASE,
                device,
                reason: format!("{} shares for {} devices", seen.len(), self.shares.len()),
            });
        }
        self.responses.insert(device, msg);
        Ok(())
    }

    /// Ends the round: reconstructs the secrets from U4's shares, removes
    /// the masks and returns Σ_{u∈U3} x_u mod 2^64 together with U3.
    ///
    /// `rng` draws the secret coefficients of the share consistency check.
    ///
    /// # Errors
    /// Wrong phase, |U4| < t, or [`SecAggError::InconsistentShares`] naming
    /// the owner whose secret failed a check.
    pub fn finish<R: CryptoRng + ?Sized>(
        &mut self,
        rng: &mut R,
    ) -> Result<(Vec<u64>, Vec<u64>), SecAggError> {
        const PHASE: Phase = Phase::Finish;
        self.expect(ServerState::Unmasking, PHASE, "finishing outside Unmasking")?;
        self.params
            .require(Phase::Unmasking, self.responses.len())?;
        self.state = ServerState::Done;
        let positions: BTreeMap<u64, usize> =
            self.keys.keys().enumerate().map(|(i, &d)| (d, i)).collect();
        let xs: Vec<u64> = self
            .responses
            .keys()
            .map(|d| positions.get(d).map_or(0, |&i| share_point(i)))
            .collect();
        let rec = Reconstructor::new(&xs, self.params.threshold, rng).map_err(|e| match e {
            ShamirError::TooFewShares { have, need } => SecAggError::TooFewDevices {
                phase: Phase::Unmasking,
                have,
                need,
            },
            _ => SecAggError::InvalidParams("share points".into()),
        })?;
        // Each response's shares by owner.
        let by_owner: Vec<BTreeMap<u64, [u64; LIMBS]>> = self
            .responses
            .values()
            .map(|r| r.shares.iter().map(|s| (s.owner, s.share)).collect())
            .collect();
        let len = self.params.vector_len;
        let mut sum = vec![0u64; len];
        for y in self.masked.values() {
            apply_mask(&mut sum, y, false);
        }
        for (&v, msg) in &self.shares {
            let kind = if self.masked.contains_key(&v) {
                SecretKind::SelfMask
            } else {
                SecretKind::PairwiseKey
            };
            let inconsistent = |reason| SecAggError::InconsistentShares {
                owner: v,
                kind,
                reason,
            };
            let mut limbs = [0u64; LIMBS];
            for (l, limb) in limbs.iter_mut().enumerate() {
                let ys: Vec<u64> = by_owner
                    .iter()
                    .map(|m| m.get(&v).map_or(shamir::P, |s| s[l]))
                    .collect();
                *limb = rec
                    .reconstruct(&ys)
                    .map_err(|_| inconsistent("shares lie on no single polynomial"))?;
            }
            let secret = shamir::limbs_to_secret(&limbs)
                .ok_or_else(|| inconsistent("reconstructed limbs out of range"))?;
            match kind {
                SecretKind::SelfMask => {
                    if crypto::commit_seed(v, &secret) != msg.b_commitment {
                        return Err(inconsistent("seed does not match its commitment"));
                    }
                    apply_mask(&mut sum, &crypto::expand_mask(&secret, len), true);
                }
                SecretKind::PairwiseKey => {
                    if !crypto::is_clamped(&secret) {
                        return Err(inconsistent("key bytes are not a clamped X25519 key"));
                    }
                    let pair = KeyPair::from_secret_bytes(secret);
                    let advertised = self.keys.get(&v).map(|k| k.s_public);
                    if advertised != Some(pair.public) {
                        return Err(inconsistent("key does not match its public key"));
                    }
                    for &u in self.masked.keys() {
                        let peer = self.keys.get(&u).ok_or(SecAggError::UnexpectedDevice {
                            phase: PHASE,
                            device: u,
                        })?;
                        let seed = crypto::pair_seed(&pair.secret, &peer.s_public, v, u)
                            .ok_or(SecAggError::WeakKey { device: u })?;
                        // u added +PRG if u < v, −PRG otherwise: undo it.
                        apply_mask(&mut sum, &crypto::expand_mask(&seed, len), u < v);
                    }
                }
            }
        }
        Ok((sum, self.masked.keys().copied().collect()))
    }
}
