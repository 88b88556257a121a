//! The FHIR R4 export of a reviewed episode, downloaded from the review
//! pages over real HTTP and validated by an outside implementation: the
//! Python `fhir.resources` package's R4 (4.0.1) models (version pinned in
//! `scripts/install-python-tools.sh`), which parse every entry into its
//! resource type and refuse unknown or ill-typed elements.

use std::io::Write;
use std::process::{Command, Stdio};

use plimsoll_server::review::db::{self, ReviewAction};
use plimsoll_server::service::now_ms;
use plimsoll_server::store::Store;
use serde_json::Value;

use crate::metrics::python_tools;
use crate::review_support::{PASSWORD, REVIEWER, ReviewFixture, http, login};

/// Validates `bundle` with the reference R4 models; returns the count of each resource type.
fn validate_r4(bundle: &str) -> Value {
    const SCRIPT: &str = r#"
import json, sys
import fhir.resources
from fhir.resources.bundle import Bundle
assert fhir.resources.__fhir_version__ == "4.0.1", fhir.resources.__fhir_version__
bundle = Bundle.parse_raw(sys.stdin.read())
counts = {}
for entry in bundle.entry:
    kind = entry.resource.resource_type
    counts[kind] = counts.get(kind, 0) + 1
print(json.dumps(counts))
"#;
    let python = python_tools();
    let mut child = Command::new(&python)
        .args(["-c", SCRIPT])
        .stdin(Stdio::piped())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap();
    child
        .stdin
        .take()
        .unwrap()
        .write_all(bundle.as_bytes())
        .unwrap();
    let out = child.wait_with_output().unwrap();
    assert!(
        out.status.success(),
        "fhir.resources refused the bundle: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    serde_json::from_slice(&out.stdout).unwrap()
}

#[tokio::test]
async fn a_reviewed_episode_exports_as_a_valid_r4_bundle() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, _, other) = f.packets;
    {
        let store = Store::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap();
        db::record_action(
            &store,
            alert,
            REVIEWER,
            ReviewAction::Escalate,
            "Called the participant; fever since Monday.",
            now_ms(),
        )
        .unwrap();
    }
    let cookie = login(f.addr(), REVIEWER, PASSWORD).await;
    let r = http(
        f.addr(),
        "GET",
        &format!("/flag/{alert}/fhir"),
        Some(&cookie),
        None,
    )
    .await;
    assert_eq!(r.status, 200, "{}", r.body);
    let header = |name: &str| {
        r.headers
            .iter()
            .find(|(k, _)| k.eq_ignore_ascii_case(name))
            .map(|(_, v)| v.clone())
            .unwrap_or_default()
    };
    assert!(header("content-type").starts_with("application/fhir+json"));
    assert!(header("content-disposition").contains(&format!("episode-{alert}.fhir.json")));

    let counts = validate_r4(&r.body);
    let bundle: Value = serde_json::from_str(&r.body).unwrap();
    let record = db::flag(
        &Store::open(&crate::support::db_location(&dir.path().join("agg.db"))).unwrap(),
        alert,
    )
    .unwrap()
    .unwrap();
    let days: usize = record.packet.signals.iter().map(|w| w.days.len()).sum();
    assert_eq!(
        counts["Observation"], days as u64,
        "one Observation per signal-day"
    );
    assert_eq!(counts["DetectedIssue"], 1);
    assert_eq!(counts["Provenance"], 1, "one per review action");

    let resources: Vec<&Value> = bundle["entry"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| &e["resource"])
        .collect();
    let issue = resources
        .iter()
        .find(|r| r["resourceType"] == "DetectedIssue")
        .unwrap();
    let detail = issue["detail"].as_str().unwrap();
    assert!(
        detail.contains("not a diagnosis") && detail.contains("qualified clinician"),
        "{detail}"
    );
    assert_eq!(issue["severity"], "high", "an Alert episode");
    assert_eq!(issue["patient"]["identifier"]["value"], "p-017");
    assert!(
        issue["mitigation"][0]["action"]["text"]
            .as_str()
            .unwrap()
            .contains("fever since Monday")
    );
    // The evidence points at Observations inside the bundle.
    let urls: Vec<&str> = bundle["entry"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["fullUrl"].as_str().unwrap())
        .collect();
    let evidence = issue["evidence"][0]["detail"].as_array().unwrap();
    assert!(!evidence.is_empty());
    for e in evidence {
        assert!(urls.contains(&e["reference"].as_str().unwrap()), "{e}");
    }
    // Resting heart rate carries its LOINC code (40443-4, from memory; see src/fhir.rs).
    assert!(resources.iter().any(|r| {
        r["code"]["coding"][0]["system"] == "http://loinc.org"
            && r["code"]["coding"][0]["code"] == "40443-4"
    }));

    // Another study's episode is not served to this reviewer.
    let r = http(
        f.addr(),
        "GET",
        &format!("/flag/{other}/fhir"),
        Some(&cookie),
        None,
    )
    .await;
    assert_eq!(r.status, 404);
    f.stop().await;
}
