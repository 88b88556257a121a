//! Whole-round tests of the secure aggregation protocol.

use super::*;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use std::collections::BTreeSet;

/// Who drops where, and who lies, in a simulated round.
#[derive(Default)]
struct Scenario {
    n: usize,
    len: usize,
    /// Advertise keys, then vanish (in U1, not U2).
    drop_after_advertise: Vec<u64>,
    /// Send shares, then vanish (in U2, not U3).
    drop_after_share: Vec<u64>,
    /// Send the masked input, then do not answer phase 3 (in U3, not U4).
    drop_after_masked: Vec<u64>,
    /// (liar, owner): the liar alters its revealed share of owner's secret.
    liar: Option<(u64, u64)>,
    threshold: Option<usize>,
}

fn ids(n: usize) -> Vec<u64> {
    (0..n as u64).map(|i| 1000 + 7 * i).collect()
}

/// A round's outcome: the server's (sum, U3) and the expected sum.
type Outcome = (Result<(Vec<u64>, Vec<u64>), SecAggError>, Vec<u64>);

/// Runs a round; returns the server's result and the plain wrapping sum of
/// the inputs of the devices that sent a masked input.
fn run(s: &Scenario, seed: u64) -> Outcome {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let all = ids(s.n);
    let params = match s.threshold {
        Some(t) => RoundParams::with_threshold(&all, s.len, t).unwrap(),
        None => RoundParams::new(&all, s.len).unwrap(),
    };
    let inputs: BTreeMap<u64, Vec<u64>> = all
        .iter()
        .map(|&d| (d, (0..s.len).map(|_| rng.random()).collect()))
        .collect();
    let mut server = Server::new(params.clone());
    let mut devices = BTreeMap::new();
    for &d in &all {
        let (dev, msg) = Device::new(d, params.clone(), &mut rng).unwrap();
        server.receive_keys(msg).unwrap();
        devices.insert(d, dev);
    }
    let mut expected = vec![0u64; s.len];
    let result = (|| {
        let broadcast = server.close_advertise()?;
        devices.retain(|d, _| !s.drop_after_advertise.contains(d));
        for dev in devices.values_mut() {
            server.receive_shares(dev.share_keys(&broadcast, &mut rng)?)?;
        }
        let relays = server.close_sharing()?;
        devices.retain(|d, _| !s.drop_after_share.contains(d));
        for (d, dev) in &mut devices {
            server.receive_masked(dev.masked_input(&relays[d], &inputs[d])?)?;
            apply_mask(&mut expected, &inputs[d], false);
        }
        let request = server.close_masking()?;
        devices.retain(|d, _| !s.drop_after_masked.contains(d));
        for (&d, dev) in &mut devices {
            let mut resp = dev.unmask(&request)?;
            if let Some((liar, owner)) = s.liar
                && liar == d
            {
                for share in resp.shares.iter_mut().filter(|sh| sh.owner == owner) {
                    share.share[0] = shamir::add(share.share[0], 1);
                }
            }
            server.receive_unmasking(resp)?;
        }
        server.finish(&mut rng)
    })();
    (result, expected)
}

#[test]
fn recovered_sum_equals_plain_wrapping_sum() {
    let s = Scenario {
        n: 10,
        len: 50,
        ..Default::default()
    };
    for seed in 0..3 {
        let (result, expected) = run(&s, seed);
        let (sum, u3) = result.unwrap();
        assert_eq!(u3.len(), 10);
        assert_eq!(sum, expected);
        assert!(expected.iter().any(|&x| x != 0));
    }
}

#[test]
fn drops_at_each_phase_still_give_the_exact_sum() {
    let all = ids(15); // t = 10
    let cases = [
        (vec![all[0]], vec![], vec![]),
        (vec![], vec![all[3], all[14]], vec![]),
        (vec![], vec![], vec![all[1], all[2]]),
        (vec![all[4]], vec![all[5], all[0]], vec![all[6], all[7]]),
    ];
    for (i, (a, b, c)) in cases.into_iter().enumerate() {
        let s = Scenario {
            n: 15,
            len: 20,
            drop_after_advertise: a.clone(),
            drop_after_share: b.clone(),
            drop_after_masked: c,
            ..Default::default()
        };
        let (result, expected) = run(&s, 100 + i as u64);
        let (sum, u3) = result.unwrap();
        assert_eq!(sum, expected, "case {i}");
        let dropped: BTreeSet<u64> = a.into_iter().chain(b).collect();
        assert!(u3.iter().all(|d| !dropped.contains(d)), "case {i}");
        assert_eq!(u3.len(), 15 - dropped.len(), "case {i}");
    }
}

#[test]
fn too_many_drops_fail_loudly_at_each_phase() {
    let all = ids(9); // t = 6
    let four: Vec<u64> = all[..4].to_vec();
    let s = Scenario {
        n: 9,
        len: 4,
        drop_after_advertise: four.clone(),
        ..Default::default()
    };
    assert_eq!(
        run(&s, 1).0.unwrap_err(),
        SecAggError::TooFewDevices {
            phase: Phase::ShareKeys,
            have: 5,
            need: 6
        }
    );
    let s = Scenario {
        n: 9,
        len: 4,
        drop_after_share: four.clone(),
        ..Default::default()
    };
    assert_eq!(
        run(&s, 2).0.unwrap_err(),
        SecAggError::TooFewDevices {
            phase: Phase::MaskedInput,
            have: 5,
            need: 6
        }
    );
    let s = Scenario {
        n: 9,
        len: 4,
        drop_after_masked: four,
        ..Default::default()
    };
    assert_eq!(
        run(&s, 3).0.unwrap_err(),
        SecAggError::TooFewDevices {
            phase: Phase::Unmasking,
            have: 5,
            need: 6
        }
    );
    // Too few advertisements: the server refuses to start phase 1.
    let params = RoundParams::new(&all, 4).unwrap();
    let mut server = Server::new(params.clone());
    let mut rng = ChaCha20Rng::seed_from_u64(4);
    for &d in &all[..5] {
        server
            .receive_keys(Device::new(d, params.clone(), &mut rng).unwrap().1)
            .unwrap();
    }
    assert_eq!(
        server.close_advertise().unwrap_err(),
        SecAggError::TooFewDevices {
            phase: Phase::AdvertiseKeys,
            have: 5,
            need: 6
        }
    );
}

#[test]
fn a_lying_share_is_detected_and_names_the_owner() {
    let all = ids(9); // t = 6
    // Surplus shares (9 responders): the polynomial check catches it.
    // Exactly t responders: the commitment / public key check catches it.
    let cases = [
        (vec![], vec![], all[2], all[5], SecretKind::SelfMask),
        (
            vec![],
            vec![all[5]],
            all[2],
            all[5],
            SecretKind::PairwiseKey,
        ),
        (
            vec![all[6], all[7], all[8]],
            vec![],
            all[1],
            all[3],
            SecretKind::SelfMask,
        ),
        (
            vec![all[6], all[7]],
            vec![all[8]],
            all[0],
            all[8],
            SecretKind::PairwiseKey,
        ),
    ];
    for (i, (late, dropped, liar, owner, kind)) in cases.into_iter().enumerate() {
        let s = Scenario {
            n: 9,
            len: 8,
            drop_after_share: dropped,
            drop_after_masked: late,
            liar: Some((liar, owner)),
            ..Default::default()
        };
        match run(&s, 40 + i as u64).0 {
            Err(SecAggError::InconsistentShares {
                owner: o, kind: k, ..
            }) => {
                assert_eq!((o, k), (owner, kind), "case {i}");
            }
            other => panic!("case {i}: expected an inconsistency, got {other:?}"),
        }
    }
}

#[test]
fn tampered_ciphertext_names_its_sender() {
    let mut rng = ChaCha20Rng::seed_from_u64(9);
    let all = ids(4);
    let params = RoundParams::new(&all, 3).unwrap();
    let mut server = Server::new(params.clone());
    let mut devices = Vec::new();
    for &d in &all {
        let (dev, msg) = Device::new(d, params.clone(), &mut rng).unwrap();
        server.receive_keys(msg).unwrap();
        devices.push(dev);
    }
    let broadcast = server.close_advertise().unwrap();
    for dev in &mut devices {
        server
            .receive_shares(dev.share_keys(&broadcast, &mut rng).unwrap())
            .unwrap();
    }
    let mut relays = server.close_sharing().unwrap();
    let victim = all[0];
    let relay = relays.get_mut(&victim).unwrap();
    relay.shares[1].ciphertext[3] ^= 0x40;
    let sender = relay.shares[1].sender;
    for dev in &mut devices {
        let m = dev.masked_input(&relays[&dev.id()], &[1, 2, 3]).unwrap();
        server.receive_masked(m).unwrap();
    }
    let request = server.close_masking().unwrap();
    assert_eq!(
        devices[0].unmask(&request).unwrap_err(),
        SecAggError::ShareAuthentication {
            sender,
            recipient: victim
        }
    );
}

#[test]
fn a_device_never_reveals_both_shares_of_a_peer() {
    let mut rng = ChaCha20Rng::seed_from_u64(12);
    let all = ids(6); // t = 4
    let params = RoundParams::new(&all, 2).unwrap();
    let mut server = Server::new(params.clone());
    let mut devices = Vec::new();
    for &d in &all {
        let (dev, msg) = Device::new(d, params.clone(), &mut rng).unwrap();
        server.receive_keys(msg).unwrap();
        devices.push(dev);
    }
    let broadcast = server.close_advertise().unwrap();
    for dev in &mut devices {
        server
            .receive_shares(dev.share_keys(&broadcast, &mut rng).unwrap())
            .unwrap();
    }
    let relays = server.close_sharing().unwrap();
    for dev in &mut devices {
        let m = dev.masked_input(&relays[&dev.id()], &[5, 6]).unwrap();
        server.receive_masked(m).unwrap();
    }
    let dev = &mut devices[0];
    // First request: all in U3, so b shares of everyone are revealed.
    let full = UnmaskingRequest { u3: all.clone() };
    let first = dev.unmask(&full).unwrap();
    assert!(first.shares.iter().all(|s| s.kind == SecretKind::SelfMask));
    // A (curious) second request claiming all[5] dropped asks for its s share.
    let partial = UnmaskingRequest {
        u3: all[..5].to_vec(),
    };
    assert_eq!(
        dev.unmask(&partial).unwrap_err(),
        SecAggError::BothSharesRequested {
            device: all[0],
            peer: all[5],
            kind: SecretKind::PairwiseKey
        }
    );
    // The other order: s share first, then b share, on another device.
    let dev = &mut devices[1];
    let first = dev.unmask(&partial).unwrap();
    assert!(
        first
            .shares
            .iter()
            .any(|s| s.owner == all[5] && s.kind == SecretKind::PairwiseKey)
    );
    assert!(matches!(
        dev.unmask(&full),
        Err(SecAggError::BothSharesRequested { peer, kind: SecretKind::SelfMask, .. }) if peer == all[5]
    ));
    // Repeating the same request is harmless: no new kind is revealed.
    assert!(dev.unmask(&partial).is_ok());
}

#[test]
fn fixed_point_inputs_sum_through_the_protocol() {
    let n = 8;
    let len = 6;
    let all = ids(n);
    let codec = FixedPoint::new(20, n as u64).unwrap();
    let mut rng = ChaCha20Rng::seed_from_u64(21);
    let params = RoundParams::new(&all, len).unwrap();
    let mut server = Server::new(params.clone());
    let mut devices = Vec::new();
    for &d in &all {
        let (dev, msg) = Device::new(d, params.clone(), &mut rng).unwrap();
        server.receive_keys(msg).unwrap();
        devices.push(dev);
    }
    let broadcast = server.close_advertise().unwrap();
    for dev in &mut devices {
        server
            .receive_shares(dev.share_keys(&broadcast, &mut rng).unwrap())
            .unwrap();
    }
    let relays = server.close_sharing().unwrap();
    let mut exact = vec![0.0; len];
    for dev in &mut devices {
        let xs: Vec<f64> = (0..len).map(|_| rng.random_range(-50.0..50.0)).collect();
        for (e, x) in exact.iter_mut().zip(&xs) {
            *e += x;
        }
        let enc = codec.encode(&xs).unwrap();
        server
            .receive_masked(dev.masked_input(&relays[&dev.id()], &enc).unwrap())
            .unwrap();
    }
    let request = server.close_masking().unwrap();
    for dev in &mut devices {
        server
            .receive_unmasking(dev.unmask(&request).unwrap())
            .unwrap();
    }
    let (sum, u3) = server.finish(&mut rng).unwrap();
    let decoded = codec.decode_sum(&sum, u3.len() as u64).unwrap();
    for (d, e) in decoded.iter().zip(&exact) {
        assert!((d - e).abs() <= codec.sum_error_bound(n as u64) + 1e-9);
    }
}

#[test]
fn threshold_rule_and_params_validation() {
    assert_eq!(default_threshold(2), 2);
    assert_eq!(default_threshold(3), 2);
    assert_eq!(default_threshold(10), 7);
    assert_eq!(default_threshold(100), 67);
    assert!(RoundParams::new(&[1], 3).is_err());
    assert!(RoundParams::new(&[1, 1, 2], 3).is_err());
    assert!(RoundParams::with_threshold(&[1, 2, 3], 3, 1).is_err());
    assert!(RoundParams::with_threshold(&[1, 2, 3], 3, 4).is_err());
    assert_eq!(
        RoundParams::new(&[3, 1, 2], 3).unwrap().devices(),
        &[1, 2, 3]
    );
}

#[test]
fn message_bytes_match_the_formula() {
    let n = 100;
    let len = 1000;
    let got = message_bytes(n, len);
    let sent = 72 + (8 + 32 + (n - 1) * 128) + (8 + 8 * len) + (8 + 49 * n);
    let received = 72 * n + (8 * n + (n - 1) * 128) + 8 * n;
    assert_eq!(got, MessageBytes { sent, received });
    assert_eq!(got.sent, 25_700);
    assert_eq!(got.received, 21_472);
    // The ciphertext size used in the formula is the real one.
    assert_eq!(SHARE_CIPHERTEXT_BYTES, 112);
}
