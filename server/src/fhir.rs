//! FHIR R4 (4.0.1) export of a reviewed episode: one `collection` Bundle
//! holding
//! - one **Observation** per signal-day of the episode's window (the value,
//!   its day as `effectiveDateTime`, the personal expected 95% range as
//!   `referenceRange`, the population-only band in a second range),
//! - one **DetectedIssue** for the episode (`identifiedPeriod` = its span,
//!   `severity` high for Alert and moderate for Watch, `evidence` = the
//!   involved signals' Observations in the episode's span, `detail` = the
//!   device's reason followed by the project's caution, `mitigation` = each
//!   review action with its note),
//! - one **Provenance** per review action (who, when, what), targeting the
//!   DetectedIssue.
//!
//! The participant is referenced by a logical identifier only (system
//! `urn:plimsoll:participant:<study>`, value the pseudonymous label): the
//! aggregator holds no patient record. Codes: LOINC where the standard has a
//! code for the daily measure (below, each marked "from memory": check them
//! against the LOINC table before a clinical deployment), otherwise the local
//! system [`LOCAL_CODES`] (documented in `docs/fhir.md`). Units are UCUM.
//! Full URLs are `urn:uuid:` values derived from the packet id, so the same
//! episode exports to the same Bundle.

use serde_json::{Value, json};
use sha2::{Digest, Sha256};

use crate::packets::{FlagLevel, SignalWindow, WindowDay};
use crate::presentation::label_of;
use crate::review::db::FlagRecord;

/// Code system of the project's local codes (signals without a LOINC code,
/// the episode's issue code).
pub const LOCAL_CODES: &str = "urn:plimsoll:code";

/// LOINC, or the local system, code and display for a signal column; UCUM unit code.
fn coding_of(signal: &str) -> (&'static str, String, String, &'static str) {
    const LOINC: &str = "http://loinc.org";
    match signal {
        // From memory: LOINC 40443-4 "Heart rate --resting".
        "resting_hr_bpm" => (
            LOINC,
            "40443-4".into(),
            "Heart rate --resting".into(),
            "/min",
        ),
        // From memory: LOINC 41950-7 "Number of steps in 24 hour Measured".
        "steps" => (
            LOINC,
            "41950-7".into(),
            "Number of steps in 24 hour Measured".into(),
            "{steps}",
        ),
        // From memory: LOINC 93832-4 "Sleep duration".
        "sleep_h" => (LOINC, "93832-4".into(), "Sleep duration".into(), "h"),
        // From memory: LOINC 9279-1 "Respiratory rate".
        "resp_rate_brpm" => (LOINC, "9279-1".into(), "Respiratory rate".into(), "/min"),
        // RMSSD has no LOINC code we rely on (80404-7 is SDNN), and a skin-temperature
        // *deviation* from the device's reference is not a body temperature (8310-5).
        "hrv_rmssd_ms" => (
            LOCAL_CODES,
            "hrv-rmssd-overnight".into(),
            label_of(signal),
            "ms",
        ),
        "skin_temp_delta_c" => (
            LOCAL_CODES,
            "skin-temp-deviation".into(),
            label_of(signal),
            "Cel",
        ),
        other => (LOCAL_CODES, other.replace('_', "-"), label_of(other), "1"),
    }
}

/// A stable `urn:uuid:` for `what` (SHA-256 of it, laid out as an RFC 4122
/// name-based UUID: version 5 bits and variant set).
fn urn(what: &str) -> String {
    let h = Sha256::digest(what.as_bytes());
    let mut b = [0u8; 16];
    b.copy_from_slice(&h[..16]);
    b[6] = (b[6] & 0x0f) | 0x50;
    b[8] = (b[8] & 0x3f) | 0x80;
    let hex: String = b.iter().map(|x| format!("{x:02x}")).collect();
    format!(
        "urn:uuid:{}-{}-{}-{}-{}",
        &hex[0..8],
        &hex[8..12],
        &hex[12..16],
        &hex[16..20],
        &hex[20..32]
    )
}

fn quantity(v: f64, unit: &str, code: &str) -> Value {
    json!({"value": v, "unit": unit, "system": "http://unitsofmeasure.org", "code": code})
}

fn xhtml(text: &str) -> Value {
    json!({
        "status": "generated",
        "div": format!(
            r#"<div xmlns="http://www.w3.org/1999/xhtml"><p>{}</p></div>"#,
            crate::review::html::esc(text)
        )
    })
}

fn observation(record: &FlagRecord, w: &SignalWindow, d: &WindowDay, subject: &Value) -> Value {
    let (system, code, display, ucum) = coding_of(&w.signal);
    let unit = crate::presentation::unit_of(&w.signal);
    let p = &w.population;
    json!({
        "resourceType": "Observation",
        "status": "final",
        "code": {
            "coding": [{"system": system, "code": code, "display": display}],
            "text": label_of(&w.signal)
        },
        "subject": subject,
        "effectiveDateTime": d.date.to_string(),
        "valueQuantity": quantity(d.observed, unit, ucum),
        "referenceRange": [
            {
                "low": quantity(d.lo95, unit, ucum),
                "high": quantity(d.hi95, unit, ucum),
                "text": "Personal expected range (95%), predicted from earlier days only"
            },
            {
                "low": quantity(p.lo95, unit, ucum),
                "high": quantity(p.hi95, unit, ucum),
                "text": "Population-only range (95%) of the study's shared prior"
            }
        ],
        "note": [{"text": format!(
            "Daily summary from a consumer wearable; study {}; the date is the participant's local calendar day.",
            record.study_id
        )}]
    })
}

/// The Bundle of `record` (a stored episode with its review history).
pub fn episode_bundle(record: &FlagRecord) -> Value {
    let p = &record.packet;
    let seed = format!("plimsoll/{}/episode/{}", record.study_id, record.packet_id);
    let subject = json!({
        "identifier": {
            "system": format!("urn:plimsoll:participant:{}", record.study_id),
            "value": record.participant
        },
        "display": format!("participant {}", record.participant)
    });
    let involved = p.involved_signals();
    let mut entries = Vec::new();
    let mut evidence = Vec::new();
    for w in &p.signals {
        for d in &w.days {
            let url = urn(&format!("{seed}/{}/{}", w.signal, d.date));
            let in_span = d.date >= p.first_day && d.date <= p.last_day;
            if in_span && (involved.is_empty() || involved.contains(&w.signal.as_str())) {
                evidence.push(json!({"reference": url}));
            }
            entries.push(json!({"fullUrl": url, "resource": observation(record, w, d, &subject)}));
        }
    }
    let caution = plimsoll_proto::caution::TEXT;
    let level = match p.level {
        FlagLevel::Alert => "Alert",
        FlagLevel::Watch => "Watch",
    };
    let mitigation: Vec<Value> = record
        .history
        .iter()
        .map(|a| {
            let mut text = format!("Reviewer action: {}", a.action.as_str());
            if !a.note.is_empty() {
                text.push_str(&format!(". Note: {}", a.note));
            }
            json!({
                "action": {"text": text},
                "date": crate::review::pages::rfc3339(a.at_ms),
                "author": {"display": a.reviewer}
            })
        })
        .collect();
    let issue_url = urn(&format!("{seed}/issue"));
    let mut issue = json!({
        "resourceType": "DetectedIssue",
        "text": xhtml(&format!("{level} episode {} to {}. {caution}", p.first_day, p.last_day)),
        "status": if p.episode.ongoing { "preliminary" } else { "final" },
        "code": {
            "coding": [{
                "system": LOCAL_CODES,
                "code": "personal-baseline-departure",
                "display": "Sustained departure from the participant's own baseline"
            }],
            "text": format!("{level}: departure from the participant's own baseline")
        },
        "severity": match p.level { FlagLevel::Alert => "high", FlagLevel::Watch => "moderate" },
        "patient": subject,
        "identifiedPeriod": {"start": p.first_day.to_string(), "end": p.last_day.to_string()},
        "detail": format!("{} {caution}", p.reason),
    });
    if !evidence.is_empty() {
        issue["evidence"] = json!([{"detail": evidence}]);
    }
    if !mitigation.is_empty() {
        issue["mitigation"] = Value::Array(mitigation);
    }
    entries.push(json!({"fullUrl": issue_url, "resource": issue}));
    for (i, a) in record.history.iter().enumerate() {
        entries.push(json!({
            "fullUrl": urn(&format!("{seed}/provenance/{i}")),
            "resource": {
                "resourceType": "Provenance",
                "target": [{"reference": issue_url}],
                "recorded": crate::review::pages::rfc3339(a.at_ms),
                "activity": {"text": a.action.as_str()},
                "reason": [{"text": if a.note.is_empty() { "(no note)".to_owned() } else { a.note.clone() }}],
                "agent": [{"who": {"display": a.reviewer}}]
            }
        }));
    }
    json!({
        "resourceType": "Bundle",
        "id": format!("plimsoll-{}-episode-{}", record.study_id, record.packet_id),
        "type": "collection",
        "timestamp": crate::review::pages::rfc3339(record.updated_ms),
        "entry": entries
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn urns_are_stable_rfc4122_shaped_and_distinct() {
        let a = urn("x");
        assert_eq!(a, urn("x"));
        assert_ne!(a, urn("y"));
        // 8-4-4-4-12 hex digits, version 5, variant 10xx (RFC 4122 section 4.1.3 and 4.1.1).
        let hex = a.strip_prefix("urn:uuid:").unwrap();
        let groups: Vec<&str> = hex.split('-').collect();
        assert_eq!(
            groups.iter().map(|g| g.len()).collect::<Vec<_>>(),
            [8, 4, 4, 4, 12]
        );
        assert!(groups[2].starts_with('5'));
        assert!(matches!(groups[3].as_bytes()[0], b'8' | b'9' | b'a' | b'b'));
    }

    #[test]
    fn signals_without_a_loinc_code_use_the_local_system() {
        assert_eq!(coding_of("resting_hr_bpm").0, "http://loinc.org");
        assert_eq!(coding_of("hrv_rmssd_ms").0, LOCAL_CODES);
        assert_eq!(coding_of("skin_temp_delta_c").3, "Cel");
    }
}
