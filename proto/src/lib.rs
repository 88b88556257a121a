//! Generated gRPC types and stubs for the `plimsoll.v1` package.
//!
//! Only the edge modules of the other crates (`server::wire`, `device_sim::wire`)
//! import from here; everything else works on the project's own types.

#[allow(missing_debug_implementations, clippy::all)]
pub mod v1 {
    tonic::include_proto!("plimsoll.v1");

    /// Encoded file descriptor set, served by gRPC reflection.
    pub const FILE_DESCRIPTOR_SET: &[u8] =
        include_bytes!(concat!(env!("OUT_DIR"), "/plimsoll_v1_descriptor.bin"));
}

/// The non-diagnostic caution, defined once for both ends: the review
/// pages, the device's outputs (`report.html`, `flags.json`, the CSVs'
/// `CAUTION.txt` sidecar), the command lines and the evaluation's outputs
/// show exactly this text wherever a flag is shown.
pub mod caution {
    /// The caution's heading, also its first sentence.
    pub const TITLE: &str = "Decision support, not a diagnosis";

    /// The whole caution. It says that a flag is not a diagnosis, that it
    /// supports (never replaces) a qualified clinician's judgement, and that
    /// local protocols and regulations govern any action.
    pub const TEXT: &str = "Decision support, not a diagnosis. A flag marks days on which a \
person's signals departed from their own expected range, and the models behind it can be wrong in \
both directions. Flags support, and never replace, the judgement of a qualified clinician who knows \
the clinical context. Local protocols and regulations govern any action.";
}

/// The device credential carried in call metadata, shared by both ends.
///
/// Every call of `plimsoll.v1.Aggregator` except `GetStudy` and `Enroll`
/// carries the metadata entry `authorization: Bearer <device_id>.<secret>`,
/// where `secret` is the 64-character lower-case hex `device_secret` the
/// device drew and sent once in its `EnrollRequest`.
pub mod auth {
    /// Metadata key of the credential.
    pub const METADATA_KEY: &str = "authorization";

    /// Length of a device secret in hex characters (256 bits).
    pub const SECRET_HEX_CHARS: usize = 64;

    /// A device's credential: its id and the secret it enrolled with.
    #[derive(Clone, PartialEq, Eq)]
    pub struct DeviceCredential {
        pub device_id: u64,
        pub secret: String,
    }

    impl std::fmt::Debug for DeviceCredential {
        // The secret never reaches a log.
        fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
            f.debug_struct("DeviceCredential")
                .field("device_id", &self.device_id)
                .field("secret", &"<redacted>")
                .finish()
        }
    }

    /// `Ok` when `secret` is 64 lower-case hex characters.
    pub fn check_secret(secret: &str) -> Result<(), String> {
        if secret.len() == SECRET_HEX_CHARS
            && secret
                .bytes()
                .all(|b| matches!(b, b'0'..=b'9' | b'a'..=b'f'))
        {
            Ok(())
        } else {
            Err(format!(
                "must be {SECRET_HEX_CHARS} lower-case hex characters (256 bits), got {} characters",
                secret.len()
            ))
        }
    }

    /// `message` as a request carrying `credential` in its metadata.
    pub fn authorized<T>(credential: &DeviceCredential, message: T) -> tonic::Request<T> {
        let mut request = tonic::Request::new(message);
        let value = credential
            .header_value()
            .parse()
            .expect("a decimal id and a hex secret form a valid metadata value");
        request.metadata_mut().insert(METADATA_KEY, value);
        request
    }

    impl DeviceCredential {
        /// The metadata value, `Bearer <device_id>.<secret>`.
        pub fn header_value(&self) -> String {
            format!("Bearer {}.{}", self.device_id, self.secret)
        }

        /// Parses a metadata value; the error says what is wrong with it.
        pub fn parse(value: &str) -> Result<DeviceCredential, String> {
            let token = value
                .strip_prefix("Bearer ")
                .ok_or("expected `Bearer <device_id>.<secret>`")?;
            let (id, secret) = token
                .split_once('.')
                .ok_or("expected `Bearer <device_id>.<secret>` (no `.` found)")?;
            let device_id = id
                .parse::<u64>()
                .map_err(|_| format!("device id `{id}` is not a number"))?;
            check_secret(secret).map_err(|e| format!("secret {e}"))?;
            Ok(DeviceCredential {
                device_id,
                secret: secret.to_owned(),
            })
        }
    }

    #[cfg(test)]
    mod tests {
        use super::*;

        #[test]
        fn header_value_round_trips_and_bad_values_say_why() {
            let c = DeviceCredential {
                device_id: 42,
                secret: "ab".repeat(32),
            };
            assert_eq!(DeviceCredential::parse(&c.header_value()), Ok(c.clone()));
            assert!(!format!("{c:?}").contains("abab"));
            for (value, says) in [
                ("42.abab", "Bearer"),
                ("Bearer 42", "no `.`"),
                ("Bearer x.ab", "not a number"),
                ("Bearer 42.ABAB", "64 lower-case hex"),
            ] {
                let err = DeviceCredential::parse(value).unwrap_err();
                assert!(err.contains(says), "{value}: {err}");
            }
        }
    }
}
