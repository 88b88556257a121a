//! Shared helpers: a real aggregator on a loopback ephemeral port, study
//! configurations, and a gRPC client.

use std::path::Path;
use std::sync::Arc;

use plimsoll_device::demo::initial_layouts;
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::service::now_ms;
use plimsoll_server::{Coordinator, LocalTraining, RunningServer, StudyConfig};
use tonic::transport::Channel;

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
    }
}

/// An aggregator serving on 127.0.0.1:0 with its database at `db`.
pub struct TestServer {
    pub coordinator: Arc<Coordinator>,
    pub server: RunningServer,
}

impl TestServer {
    pub async fn start(db: &Path, studies: Vec<StudyConfig>) -> TestServer {
        let coordinator = Arc::new(Coordinator::open(db).expect("open database"));
        for s in studies {
            coordinator.create_study(s, now_ms()).expect("create study");
        }
        let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
        let server = plimsoll_server::serve(coordinator.clone(), listener)
            .await
            .unwrap();
        TestServer {
            coordinator,
            server,
        }
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
