//! Shared helpers: a real aggregator on a loopback ephemeral port, study
//! configurations, and a gRPC client.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use plimsoll_device::client::{EnrollmentRequest, FlagSharing, enroll, new_device_secret};
use plimsoll_proto::auth::DeviceCredential;

use plimsoll_device::demo::initial_layouts;
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::service::now_ms;
use plimsoll_server::{Coordinator, LocalTraining, RunningServer, StudyConfig};
use tonic::transport::Channel;

/// Where a test's aggregator database lives: `path` (a SQLite file), or, when the suite
/// runs against PostgreSQL (`PLIMSOLL_TEST_STORE=postgres`, see `scripts/test`), a database
/// on the test cluster named after `path`, created on first use, so that every test that
/// opens the same path reaches the same database.
pub fn db_location(path: &Path) -> PathBuf {
    let already_postgres = path
        .to_str()
        .is_some_and(plimsoll_server::db::is_postgres_url);
    if already_postgres || std::env::var("PLIMSOLL_TEST_STORE").as_deref() != Ok("postgres") {
        return path.to_path_buf();
    }
    use std::hash::{Hash, Hasher};
    let mut h = std::collections::hash_map::DefaultHasher::new();
    path.hash(&mut h);
    let name = format!("t_{:016x}", h.finish());
    PathBuf::from(plimsoll_server::db::test_database_named(&name))
}

/// A new database for one test on the PostgreSQL test cluster, or `None` (skipped).
pub fn fresh_postgres_database(test: &str) -> Option<String> {
    plimsoll_server::db::test_database(test)
}

/// A study over `signals` with `devices` expected devices, all selected each round.
pub fn study_config(id: &str, signals: &[Signal], devices: u32, rounds: u32) -> StudyConfig {
    StudyConfig {
        study_id: id.into(),
        title: format!("test study {id}"),
        signals: initial_layouts(signals),
        rounds,
        training: LocalTraining::default(),
        fraction_per_round: 1.0,
        min_quorum: devices,
        start_when_enrolled: devices,
        round_deadline_ms: 600_000,
        selection_seed: 1,
        aggregation: Default::default(),
        alert_budget_per_participant_month:
            plimsoll_server::study::DEFAULT_ALERT_BUDGET_PER_PARTICIPANT_MONTH,
        review_level: plimsoll_server::packets::FlagLevel::Alert,
        sensor_models: None,
        subgroups: None,
        dp: None,
        secure_aggregation: None,
        alert_direction: None,
    }
}

/// An aggregator serving on 127.0.0.1:0 with its database at `db`.
pub struct TestServer {
    pub coordinator: Arc<Coordinator>,
    pub server: RunningServer,
    /// Enrollment code of each study created by `start`.
    pub codes: BTreeMap<String, String>,
}

impl TestServer {
    pub async fn start(db: &Path, studies: Vec<StudyConfig>) -> TestServer {
        let coordinator = Arc::new(Coordinator::open(&db_location(db)).expect("open database"));
        let mut codes = BTreeMap::new();
        for s in studies {
            let id = s.study_id.clone();
            let code = coordinator.create_study(s, now_ms()).expect("create study");
            codes.insert(id, code);
        }
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let server = plimsoll_server::serve(coordinator.clone(), listener)
            .await
            .unwrap();
        TestServer {
            coordinator,
            server,
            codes,
        }
    }

    /// The enrollment code of `study` (created by `start`).
    pub fn code(&self, study: &str) -> &str {
        &self.codes[study]
    }

    /// Enrols `label` in `study` with `signals` and a fresh device secret,
    /// as a device would.
    pub async fn enroll(
        &self,
        study: &str,
        label: &str,
        signals: &[&str],
        sharing: FlagSharing,
    ) -> DeviceCredential {
        self.enroll_with_secret(study, label, signals, sharing, &new_device_secret())
            .await
    }

    /// [`Self::enroll`] with a given device secret (enrolling again with the
    /// same secret is a retry or a change of consent).
    pub async fn enroll_with_secret(
        &self,
        study: &str,
        label: &str,
        signals: &[&str],
        sharing: FlagSharing,
        secret: &str,
    ) -> DeviceCredential {
        enroll(
            &mut self.client(),
            EnrollmentRequest {
                study_id: study,
                enrollment_code: self.code(study),
                participant: label,
                signals: signals.iter().map(|s| (*s).to_owned()).collect(),
                sharing,
                device_secret: secret,
                sensor_model: "",
                group_label: "",
            },
        )
        .await
        .expect("enrol")
    }

    pub fn channel(&self) -> Channel {
        plimsoll_device::client::connect_lazy(self.server.addr).unwrap()
    }

    pub fn client(&self) -> AggregatorClient<Channel> {
        AggregatorClient::new(self.channel())
    }

    pub async fn stop(self) {
        self.server.shutdown().await.unwrap();
    }
}
