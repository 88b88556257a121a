//! Differential privacy of the shared prior: the accountant against Google's `dp-accounting`
//! 0.6.0 (`RdpAccountant` with the same integer orders 2–256, Poisson-sampled Gaussian events;
//! installed by `scripts/install-python-tools.sh`), and a private study over real gRPC on
//! loopback: clipped, noised rounds, and training that stops when the ε budget is spent.

use std::process::Command;

use plimsoll_device::client::{FlagSharing, authorized};
use plimsoll_device::prior::PriorParams;
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1 as pb;
use plimsoll_server::privacy::{DpSettings, epsilon};

use crate::metrics::python_tools;
use crate::support::{TestServer, study_config};

/// (q, z, rounds, δ): sampling rates from 1% to all, noise from 0.6 to 5, 1 to 1,000 rounds.
const GRID: [(f64, f64, u32, f64); 7] = [
    (0.01, 1.0, 80, 1e-4),
    (0.01, 0.6, 80, 1e-4),
    (1.0, 5.0, 80, 1.0 / 24.0),
    (0.1, 1.1, 200, 1e-5),
    (0.05, 2.0, 1000, 1e-6),
    (0.3, 0.8, 1, 1e-3),
    (0.002, 0.7, 365, 1e-4),
];

#[test]
fn accountant_matches_dp_accounting() {
    const SCRIPT: &str = r#"
import json, sys
import dp_accounting
from dp_accounting import rdp
orders = list(range(2, 257))
out = []
for q, z, t, d in json.loads(sys.argv[1]):
    acc = rdp.RdpAccountant(orders)
    acc.compose(dp_accounting.SelfComposedDpEvent(
        dp_accounting.PoissonSampledDpEvent(q, dp_accounting.GaussianDpEvent(z)), t))
    out.append(float(acc.get_epsilon(d)))
print(json.dumps(out))
"#;
    let grid = serde_json::to_string(&GRID).unwrap();
    let out = Command::new(python_tools())
        .args(["-c", SCRIPT, &grid])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "dp-accounting failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let reference: Vec<f64> = serde_json::from_slice(&out.stdout).unwrap();
    for (&(q, z, t, d), want) in GRID.iter().zip(&reference) {
        let (got, order) = epsilon(q, z, t, d);
        assert!(
            (got - want).abs() <= 1e-9 * want.max(1.0),
            "q {q}, z {z}, {t} rounds, δ {d}: ε {got} (order {order}) vs dp-accounting {want}"
        );
    }
}

/// Four devices, every one selected each round (q = 1), clipping norm 0.5, noise multiplier
/// 1, δ = 10⁻³; the budget is ε after two rounds, so training stops after two of the five
/// planned. Every device pushes the first coordinate up by 100: clipped to 0.5, their mean
/// moves it by 0.5, plus noise of standard deviation zC/N = 0.125 (a 5-sigma bound: common
/// practice); without clipping it would move by 100.
#[tokio::test]
async fn a_private_study_clips_adds_noise_and_stops_at_its_budget() {
    let dir = tempfile::tempdir().unwrap();
    let mut config = study_config("private", &[Signal::RestingHr], 4, 5);
    let (z, c, delta) = (1.0, 0.5, 1e-3);
    config.dp = Some(DpSettings {
        noise_multiplier: z,
        clip_norm: c,
        epsilon_budget: epsilon(1.0, z, 2, delta).0 + 1e-9,
        delta,
    });
    assert_eq!(config.round_limit(), 2);
    let server = TestServer::start(&dir.path().join("agg.db"), vec![config]).await;
    let mut creds = Vec::new();
    for i in 0..4 {
        creds.push(
            server
                .enroll(
                    "private",
                    &format!("p-{i}"),
                    &["resting_hr_bpm"],
                    FlagSharing::Withheld,
                )
                .await,
        );
    }
    let mut client = server.client();
    let study = client
        .get_study(pb::GetStudyRequest {
            study_id: "private".into(),
        })
        .await
        .unwrap()
        .into_inner();
    assert_eq!(study.rounds_planned, 2, "the budget allows two rounds");

    let mut current = PriorParams::initial(Signal::RestingHr).values.to_vec();
    for round in 1..=2u64 {
        for cred in &creds {
            let mut values = current.clone();
            values[0] += 100.0;
            let update = pb::SubmitUpdateRequest {
                study_id: "private".into(),
                device_id: cred.device_id,
                round_id: round,
                updates: vec![pb::SignalUpdate {
                    signal: "resting_hr_bpm".into(),
                    values,
                    n_days: 30,
                    local_loss: 1.0,
                }],
            };
            client
                .submit_update(authorized(cred, update))
                .await
                .unwrap();
        }
        let prior = client
            .get_prior(authorized(
                &creds[0],
                pb::GetPriorRequest {
                    study_id: "private".into(),
                    version: 0,
                },
            ))
            .await
            .unwrap()
            .into_inner();
        assert_eq!(u64::from(prior.version), round);
        let next = &prior.params[0].values;
        let sd = z * c / 4.0;
        let moved = next[0] - current[0];
        assert!(
            (moved - 0.5).abs() < 5.0 * sd,
            "round {round}: the first coordinate moved by {moved}"
        );
        let others: Vec<f64> = next
            .iter()
            .zip(&current)
            .skip(1)
            .map(|(a, b)| a - b)
            .collect();
        assert!(others.iter().all(|d| d.abs() < 5.0 * sd), "{others:?}");
        assert!(
            others.iter().any(|d| *d != 0.0),
            "noise was added: {others:?}"
        );
        current = next.clone();
    }
    // The budget is spent: no third round.
    let status = server.coordinator.status("private").unwrap();
    assert_eq!(status.rounds_completed, 2);
    let task = client
        .fetch_task(authorized(
            &creds[0],
            pb::FetchTaskRequest {
                study_id: "private".into(),
                device_id: creds[0].device_id,
                wait_ms: 0,
            },
        ))
        .await
        .unwrap()
        .into_inner();
    assert!(
        matches!(task.work, Some(pb::fetch_task_response::Work::Done(_))),
        "{task:?}"
    );
    let spent = status.config.epsilon_spent(2).unwrap();
    assert!(spent <= status.config.dp.unwrap().epsilon_budget);
    server.stop().await;
}
