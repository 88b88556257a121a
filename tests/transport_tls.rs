//! TLS on both endpoints, over real loopback connections: a device that
//! trusts the development CA enrols and trains over gRPC with TLS; one that
//! trusts another CA, or speaks plaintext, gets nothing; the review pages are
//! served over HTTPS with `Secure` session cookies; and the device refuses
//! plaintext to a host off loopback.

use std::path::Path;
use std::sync::Arc;

use plimsoll_device::client::{
    AggregatorAddress, EnrollmentRequest, FlagSharing, authorized, connect_to, enroll,
    new_device_secret,
};
use plimsoll_device::signal::Signal;
use plimsoll_proto::v1 as pb;
use plimsoll_proto::v1::aggregator_client::AggregatorClient;
use plimsoll_server::review::accounts;
use plimsoll_server::service::now_ms;
use plimsoll_server::store::Store;
use plimsoll_server::tls::{DevCertificate, write_dev_certificate};
use plimsoll_server::{Coordinator, TlsIdentity, serve_review_with, serve_with};
use tokio_rustls::TlsConnector;
use tokio_rustls::rustls::pki_types::pem::PemObject;
use tokio_rustls::rustls::pki_types::{CertificateDer, ServerName};
use tokio_rustls::rustls::{self, ClientConfig, RootCertStore};

use crate::review_support::{form, http_on};
use crate::support::study_config;

const STUDY: &str = "tls";

fn dev_cert(dir: &Path) -> (DevCertificate, TlsIdentity) {
    let files = write_dev_certificate(dir, &["localhost".into(), "127.0.0.1".into()], 7).unwrap();
    let identity = TlsIdentity::load(&files.cert, &files.key).unwrap();
    (files, identity)
}

fn address(url: String, ca: &Path) -> AggregatorAddress {
    AggregatorAddress {
        url,
        ca_pem: Some(std::fs::read(ca).unwrap()),
        insecure_plaintext: false,
    }
}

#[tokio::test]
async fn devices_train_over_grpc_with_tls_and_untrusted_clients_get_nothing() {
    let dir = tempfile::tempdir().unwrap();
    let (files, identity) = dev_cert(&dir.path().join("certs"));
    let coordinator = Arc::new(
        Coordinator::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap(),
    );
    let code = coordinator
        .create_study(study_config(STUDY, &[Signal::RestingHr], 1, 1), now_ms())
        .unwrap();
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let server = serve_with(coordinator.clone(), listener, Some(&identity))
        .await
        .unwrap();
    let port = server.addr.port();

    // By name and by address: both are in the certificate.
    for url in [
        format!("https://localhost:{port}"),
        format!("https://127.0.0.1:{port}"),
    ] {
        let mut client = AggregatorClient::new(connect_to(&address(url, &files.ca)).unwrap());
        let study = client
            .get_study(pb::GetStudyRequest {
                study_id: STUDY.into(),
            })
            .await
            .unwrap()
            .into_inner();
        assert_eq!(study.study_id, STUDY);
    }
    let mut client = AggregatorClient::new(
        connect_to(&address(format!("https://localhost:{port}"), &files.ca)).unwrap(),
    );
    let secret = new_device_secret();
    let me = enroll(
        &mut client,
        EnrollmentRequest {
            study_id: STUDY,
            enrollment_code: &code,
            participant: "p-1",
            signals: vec!["resting_hr_bpm".into()],
            sharing: FlagSharing::Withheld,
            device_secret: &secret,
            sensor_model: "",
            group_label: "",
        },
    )
    .await
    .unwrap();
    let work = client
        .fetch_task(authorized(
            &me,
            pb::FetchTaskRequest {
                study_id: STUDY.into(),
                device_id: me.device_id,
                wait_ms: 2_000,
            },
        ))
        .await
        .unwrap()
        .into_inner()
        .work;
    assert!(
        matches!(work, Some(pb::fetch_task_response::Work::Task(_))),
        "{work:?}"
    );

    // A device that trusts another authority cannot connect at all.
    let (other, _) = dev_cert(&dir.path().join("other-certs"));
    let mut stranger = AggregatorClient::new(
        connect_to(&address(format!("https://localhost:{port}"), &other.ca)).unwrap(),
    );
    let err = stranger
        .get_study(pb::GetStudyRequest {
            study_id: STUDY.into(),
        })
        .await
        .unwrap_err();
    assert_eq!(err.code(), tonic::Code::Unavailable, "{err:?}");
    // Nor does a plaintext client.
    let plain = tonic::transport::Endpoint::from_shared(format!("http://127.0.0.1:{port}"))
        .unwrap()
        .connect_lazy();
    let err = AggregatorClient::new(plain)
        .get_study(pb::GetStudyRequest {
            study_id: STUDY.into(),
        })
        .await
        .unwrap_err();
    assert_ne!(err.code(), tonic::Code::Ok);
    assert_eq!(coordinator.status(STUDY).unwrap().devices_enrolled, 1);
    server.shutdown().await.unwrap();
}

#[tokio::test]
async fn the_device_refuses_plaintext_off_loopback_and_https_without_a_ca() {
    let refused = |url: &str, ca: Option<Vec<u8>>| {
        connect_to(&AggregatorAddress {
            url: url.into(),
            ca_pem: ca,
            insecure_plaintext: false,
        })
        .unwrap_err()
        .to_string()
    };
    assert!(refused("http://192.0.2.7:50051", None).contains("refusing plaintext"));
    assert!(refused("http://aggregator.example:50051", None).contains("refusing plaintext"));
    assert!(refused("https://aggregator.example:50051", None).contains("CA certificate"));
    assert!(refused("ftp://aggregator.example", None).contains("https://"));
    // Loopback plaintext is fine, and so is plaintext forced explicitly.
    for url in ["http://127.0.0.1:1", "http://localhost:1", "http://[::1]:1"] {
        connect_to(&AggregatorAddress {
            url: url.into(),
            ca_pem: None,
            insecure_plaintext: false,
        })
        .unwrap();
    }
    connect_to(&AggregatorAddress {
        url: "http://192.0.2.7:50051".into(),
        ca_pem: None,
        insecure_plaintext: true,
    })
    .unwrap();
}

/// A TLS client for the review pages that trusts `ca`.
fn https_connector(ca: &Path) -> TlsConnector {
    let mut roots = RootCertStore::empty();
    for cert in CertificateDer::pem_file_iter(ca).unwrap() {
        roots.add(cert.unwrap()).unwrap();
    }
    let config =
        ClientConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
            .with_safe_default_protocol_versions()
            .unwrap()
            .with_root_certificates(roots)
            .with_no_client_auth();
    TlsConnector::from(Arc::new(config))
}

#[tokio::test]
async fn review_pages_are_served_over_https_with_secure_cookies() {
    let dir = tempfile::tempdir().unwrap();
    let (files, identity) = dev_cert(&dir.path().join("certs"));
    let db = dir.path().join("agg.db");
    {
        let coordinator = Coordinator::open(&crate::support::db_location(&db)).unwrap();
        coordinator
            .create_study(study_config(STUDY, &[Signal::RestingHr], 1, 1), now_ms())
            .unwrap();
        let mut store = Store::open(&crate::support::db_location(&db)).unwrap();
        accounts::add_reviewer(&mut store, "rev-tls", "a long enough password", now_ms()).unwrap();
        accounts::assign(&mut store, "rev-tls", STUDY).unwrap();
    }
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let review = serve_review_with(&crate::support::db_location(&db), listener, Some(&identity))
        .await
        .unwrap();
    assert!(review.url().starts_with("https://"), "{}", review.url());
    let connector = https_connector(&files.ca);
    let connect = || async {
        let tcp = tokio::net::TcpStream::connect(review.addr).await.unwrap();
        connector
            .connect(ServerName::try_from("localhost").unwrap(), tcp)
            .await
            .unwrap()
    };

    let page = http_on(connect().await, "localhost", "GET", "/login", None, None).await;
    assert_eq!(page.status, 200);
    assert!(
        page.body.contains("not a diagnosis"),
        "the caution is on the login page"
    );
    let login = http_on(
        connect().await,
        "localhost",
        "POST",
        "/login",
        None,
        Some((
            "application/x-www-form-urlencoded",
            form(&[("name", "rev-tls"), ("password", "a long enough password")]),
        )),
    )
    .await;
    assert_eq!(login.status, 303, "{}", login.body);
    let cookie = login.header("set-cookie").unwrap();
    assert!(cookie.contains("; Secure"), "{cookie}");
    assert!(cookie.contains("HttpOnly"), "{cookie}");

    // A plaintext request to the HTTPS port gets no page.
    let mut tcp = tokio::net::TcpStream::connect(review.addr).await.unwrap();
    use tokio::io::{AsyncReadExt, AsyncWriteExt};
    tcp.write_all(b"GET /login HTTP/1.1\r\nHost: x\r\nConnection: close\r\n\r\n")
        .await
        .unwrap();
    let mut answer = Vec::new();
    let _ = tcp.read_to_end(&mut answer).await;
    assert!(
        !String::from_utf8_lossy(&answer).contains("not a diagnosis"),
        "no page in plaintext"
    );
    review.shutdown().await.unwrap();
}
