//! `plimsoll participate`: one participant's device taking part in a study
//! run by an aggregator elsewhere (TLS), then computing its personalised
//! posterior, prospective bands and flags locally.
//!
//! The device keeps its secret in `<out>/device-secret` (owner read/write
//! only), created on the first run. A later run enrols again with it, which
//! the aggregator answers with the same device id, so an interrupted device
//! resumes where the study is.

use std::io::Write;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::{Context, anyhow, bail};
use plimsoll_proto::auth::check_secret;
use tokio::sync::Semaphore;

use crate::client::{
    AggregatorAddress, DeviceOptions, DeviceReport, FlagSharing, connect_to, new_device_secret,
    run_device_with,
};
use crate::cohort::{BadRowPolicy, read_daily, write_quarantine_files};

/// Name of the file holding the device's secret inside its output folder.
pub const SECRET_FILE: &str = "device-secret";

/// Settings of one device's run.
#[derive(Clone)]
pub struct ParticipateOptions {
    pub address: AggregatorAddress,
    pub study_id: String,
    pub enrollment_code: String,
    /// Participant label; it selects the participant's rows in `data`.
    pub participant: String,
    /// The participant's daily measures in the shared cohort format.
    pub data: PathBuf,
    pub out_dir: PathBuf,
    pub sharing: FlagSharing,
    /// The device's sensor model, when the study lists models.
    pub sensor_model: Option<String>,
    /// The participant's level of the study's group column, when it has one.
    pub group_label: Option<String>,
    /// Abort on the first bad row of `data`, or quarantine bad rows (copied
    /// to `out_dir/quarantine/`) and go on.
    pub bad_rows: BadRowPolicy,
}

impl std::fmt::Debug for ParticipateOptions {
    // The enrollment code never reaches a log.
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("ParticipateOptions")
            .field("address", &self.address.url)
            .field("study_id", &self.study_id)
            .field("participant", &self.participant)
            .field("data", &self.data)
            .field("out_dir", &self.out_dir)
            .field("sharing", &self.sharing)
            .field("bad_rows", &self.bad_rows)
            .finish_non_exhaustive()
    }
}

/// Reads the device secret kept in `dir`, or draws one and keeps it there
/// (created with owner-only permissions, never overwritten).
pub fn load_or_create_secret(dir: &Path) -> anyhow::Result<String> {
    let path = dir.join(SECRET_FILE);
    match std::fs::read_to_string(&path) {
        Ok(text) => {
            let secret = text.trim().to_owned();
            check_secret(&secret).map_err(|e| anyhow!("{}: the secret {e}", path.display()))?;
            Ok(secret)
        }
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => {
            std::fs::create_dir_all(dir).with_context(|| format!("creating {}", dir.display()))?;
            let secret = new_device_secret();
            let mut options = std::fs::OpenOptions::new();
            options.write(true).create_new(true);
            #[cfg(unix)]
            {
                use std::os::unix::fs::OpenOptionsExt;
                options.mode(0o600);
            }
            let mut file = options
                .open(&path)
                .with_context(|| format!("creating {}", path.display()))?;
            writeln!(file, "{secret}").with_context(|| format!("writing {}", path.display()))?;
            Ok(secret)
        }
        Err(e) => Err(e).with_context(|| format!("reading {}", path.display())),
    }
}

/// Runs the device to the end of the study and writes its outputs.
pub async fn run_participate(opts: &ParticipateOptions) -> anyhow::Result<DeviceReport> {
    let (participants, issues) = read_daily(&opts.data, opts.bad_rows)
        .with_context(|| format!("reading --data {}", opts.data.display()))?;
    for issue in &issues {
        eprintln!("input issue (row kept out): {issue}");
    }
    if issues.iter().any(|i| i.is_row_error()) {
        std::fs::create_dir_all(&opts.out_dir)
            .with_context(|| format!("creating the output folder {}", opts.out_dir.display()))?;
        for file in write_quarantine_files(&issues, &opts.out_dir)? {
            eprintln!("{file}");
        }
    }
    let series = participants
        .into_iter()
        .find(|p| p.participant == opts.participant)
        .ok_or_else(|| {
            anyhow!(
                "{}: no rows for participant `{}`",
                opts.data.display(),
                opts.participant
            )
        })?;
    if opts.enrollment_code.trim().is_empty() {
        bail!("no enrollment code given");
    }
    let secret = load_or_create_secret(&opts.out_dir)?;
    let channel = connect_to(&opts.address)?;
    let device = DeviceOptions {
        study_id: opts.study_id.clone(),
        enrollment_code: opts.enrollment_code.clone(),
        out_dir: opts.out_dir.clone(),
        wait_ms: 10_000,
        seed: rand::random(),
        device_secret: Some(secret),
        sensor_model: opts.sensor_model.clone(),
        group_label: opts.group_label.clone(),
    };
    let cpu = Arc::new(Semaphore::new(
        std::thread::available_parallelism().map_or(1, |n| n.get()),
    ));
    run_device_with(channel, series, device, opts.sharing, cpu).await
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn the_secret_is_kept_private_and_reused() {
        let dir = tempfile::tempdir().unwrap();
        let first = load_or_create_secret(dir.path()).unwrap();
        assert_eq!(load_or_create_secret(dir.path()).unwrap(), first);
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt;
            let mode = std::fs::metadata(dir.path().join(SECRET_FILE))
                .unwrap()
                .permissions()
                .mode();
            assert_eq!(mode & 0o777, 0o600);
        }
        std::fs::write(dir.path().join(SECRET_FILE), "not hex\n").unwrap();
        let err = load_or_create_secret(dir.path()).unwrap_err();
        assert!(err.to_string().contains(SECRET_FILE), "{err}");
    }
}
