//! Cost of one secure-aggregation round (`plimsoll_server::secagg`, Bonawitz et al. 2017)
//! against its baseline, the plain FedAvg sum of the same vectors, in the same run.
//!
//! ```sh
//! cargo run --release -p plimsoll-server --example secagg_cost -- [N]...   # default 100 300 1000
//! ```
//!
//! Every device of a round runs in this process, one after another. For each round size N
//! (vector length 54: six signals × (7 parameters + day count + loss), fixed point) it
//! prints the bytes each device sends and receives (payload, `secagg::message_bytes`), the
//! aggregator's time (receiving, relaying, unmasking: everything on the server side), the
//! time of one device on average, and both as ratios to the plain sum of the same N vectors.
//! It also prints the part of the aggregator's time spent finishing (rebuilding masks and
//! secrets, decoding), which the coordinator runs outside its lock (`secure_round`, "Finishing
//! outside the coordinator's lock"); the rest is spent under the lock, message by message.
//! A tenth of the devices drops after sharing its keys, so the aggregator also rebuilds
//! their pairwise masks. Per-device work and traffic grow as O(N), the aggregator's as O(N²).

use std::time::{Duration, Instant};

use plimsoll_server::secagg::{Device, RoundParams, Server, message_bytes};

/// Six signals × (7 parameters + day count + loss).
const VECTOR_LEN: usize = 54;

fn main() {
    let sizes: Vec<usize> = std::env::args()
        .skip(1)
        .map(|a| a.parse().expect("round sizes are whole numbers"))
        .collect();
    let sizes = if sizes.is_empty() {
        vec![100, 300, 1000]
    } else {
        sizes
    };
    println!(
        "{:>6} {:>14} {:>14} {:>12} {:>12} {:>12} {:>14} {:>14}",
        "N",
        "sent B/device",
        "recv B/device",
        "server s",
        "finish s",
        "device ms",
        "server / sum",
        "device / sum"
    );
    for n in sizes {
        let (server, finish, device, plain) = one_round(n);
        let bytes = message_bytes(n, VECTOR_LEN);
        let ratio = |t: Duration| t.as_secs_f64() / plain.as_secs_f64().max(1e-9);
        println!(
            "{n:>6} {:>14} {:>14} {:>12.3} {:>12.3} {:>12.2} {:>13.0}× {:>13.0}×",
            bytes.sent,
            bytes.received,
            server.as_secs_f64(),
            finish.as_secs_f64(),
            device.as_secs_f64() * 1000.0,
            ratio(server),
            ratio(device)
        );
    }
    println!(
        "baseline: the plain wrapping sum of the same N vectors of {VECTOR_LEN} values (what the aggregator does without secure aggregation)"
    );
}

/// One round with `n` devices: (aggregator time, of which finishing, mean device time,
/// plain-sum time).
fn one_round(n: usize) -> (Duration, Duration, Duration, Duration) {
    let mut rng = rand::rng();
    let ids: Vec<u64> = (1..=n as u64).collect();
    let params = RoundParams::new(&ids, VECTOR_LEN).expect("valid round");
    let inputs: Vec<Vec<u64>> = ids
        .iter()
        .map(|&id| (0..VECTOR_LEN as u64).map(|j| id * 1000 + j).collect())
        .collect();
    let mut device_time = Duration::ZERO;
    let mut server_time = Duration::ZERO;
    let mut server = Server::new(params.clone());

    let mut devices = Vec::with_capacity(n);
    for &id in &ids {
        let t = Instant::now();
        let (device, keys) = Device::new(id, params.clone(), &mut rng).expect("selected");
        device_time += t.elapsed();
        let t = Instant::now();
        server.receive_keys(keys).expect("keys");
        server_time += t.elapsed();
        devices.push(device);
    }
    let t = Instant::now();
    let broadcast = server.close_advertise().expect("enough devices");
    server_time += t.elapsed();
    for device in &mut devices {
        let t = Instant::now();
        let shares = device.share_keys(&broadcast, &mut rng).expect("shares");
        device_time += t.elapsed();
        let t = Instant::now();
        server.receive_shares(shares).expect("shares accepted");
        server_time += t.elapsed();
    }
    let t = Instant::now();
    let relays = server.close_sharing().expect("enough devices");
    server_time += t.elapsed();
    // A tenth drops after sharing: their masks must be rebuilt.
    let dropped = n / 10;
    let mut expected = vec![0u64; VECTOR_LEN];
    for (i, device) in devices.iter_mut().enumerate().skip(dropped) {
        let t = Instant::now();
        let masked = device
            .masked_input(&relays[&device.id()], &inputs[i])
            .expect("masked input");
        device_time += t.elapsed();
        for (e, x) in expected.iter_mut().zip(&inputs[i]) {
            *e = e.wrapping_add(*x);
        }
        let t = Instant::now();
        server.receive_masked(masked).expect("masked accepted");
        server_time += t.elapsed();
    }
    let t = Instant::now();
    let request = server.close_masking().expect("enough devices");
    server_time += t.elapsed();
    for device in devices.iter_mut().skip(dropped) {
        let t = Instant::now();
        let response = device.unmask(&request).expect("unmasking");
        device_time += t.elapsed();
        let t = Instant::now();
        server
            .receive_unmasking(response)
            .expect("response accepted");
        server_time += t.elapsed();
    }
    let t = Instant::now();
    let (sum, _) = server.finish(&mut rng).expect("sum");
    let finish_time = t.elapsed();
    server_time += finish_time;
    assert_eq!(sum, expected, "the protocol's sum equals the plain sum");

    // Baseline: the plain sum of the surviving inputs, repeated for a measurable time.
    let reps = 1000;
    let t = Instant::now();
    for _ in 0..reps {
        let mut plain = vec![0u64; VECTOR_LEN];
        for x in &inputs[dropped..] {
            for (p, v) in plain.iter_mut().zip(x) {
                *p = p.wrapping_add(*v);
            }
        }
        std::hint::black_box(&plain);
    }
    let plain = t.elapsed() / reps;
    (server_time, finish_time, device_time / n as u32, plain)
}
