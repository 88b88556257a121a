//! Retrying RPCs on transient failures with capped exponential backoff and
//! full jitter (Brooker, "Exponential Backoff And Jitter", AWS Architecture
//! Blog, 2015: sleep = uniform(0, min(cap, base · 2^attempt))).
//!
//! Safe because every retried call is idempotent on the aggregator: Enroll
//! returns the same id for the same label, FetchTask reads state, and an
//! identical SubmitUpdate or flag packet is answered as the first one was.

use std::future::Future;
use std::time::Duration;

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use tonic::{Code, Status};

/// Backoff schedule.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Backoff {
    pub base: Duration,
    pub cap: Duration,
    /// Attempts in all, including the first.
    pub max_attempts: u32,
}

impl Default for Backoff {
    /// 100 ms doubling to at most 5 s, 10 attempts (about 25 s of waiting at
    /// most): enough to ride out an aggregator restart.
    fn default() -> Self {
        Backoff {
            base: Duration::from_millis(100),
            cap: Duration::from_secs(5),
            max_attempts: 10,
        }
    }
}

impl Backoff {
    /// Upper end of the jittered sleep before retry number `attempt` (0-based).
    pub fn ceiling(&self, attempt: u32) -> Duration {
        let doubled = self
            .base
            .saturating_mul(1u32.checked_shl(attempt.min(30)).unwrap_or(u32::MAX));
        doubled.min(self.cap)
    }

    /// A full-jitter sleep: uniform in `[0, ceiling(attempt)]`.
    pub fn delay<R: Rng>(&self, attempt: u32, rng: &mut R) -> Duration {
        self.ceiling(attempt).mul_f64(rng.random::<f64>())
    }
}

/// Whether a failed call may succeed if repeated unchanged.
pub fn is_transient(status: &Status) -> bool {
    matches!(
        status.code(),
        Code::Unavailable
            | Code::DeadlineExceeded
            | Code::ResourceExhausted
            | Code::Aborted
            | Code::Unknown
    )
}

/// Runs `call` until it succeeds, fails permanently, or the attempts run out.
pub async fn retry<T, F, Fut>(backoff: &Backoff, seed: u64, mut call: F) -> Result<T, Status>
where
    F: FnMut() -> Fut,
    Fut: Future<Output = Result<T, Status>>,
{
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut attempt = 0;
    loop {
        match call().await {
            Ok(v) => return Ok(v),
            Err(status) if is_transient(&status) && attempt + 1 < backoff.max_attempts => {
                let pause = backoff.delay(attempt, &mut rng);
                tracing::debug!(code = ?status.code(), attempt, ?pause, "transient RPC failure; retrying");
                tokio::time::sleep(pause).await;
                attempt += 1;
            }
            Err(status) => return Err(status),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::{AtomicU32, Ordering};

    #[test]
    fn delays_stay_under_the_capped_doubling_ceiling() {
        let b = Backoff::default();
        // By hand: 100, 200, 400, … ms, capped at 5 s from attempt 6 (6.4 s).
        assert_eq!(b.ceiling(0), Duration::from_millis(100));
        assert_eq!(b.ceiling(3), Duration::from_millis(800));
        assert_eq!(b.ceiling(6), Duration::from_secs(5));
        assert_eq!(b.ceiling(40), Duration::from_secs(5));
        let mut rng = ChaCha8Rng::seed_from_u64(1);
        let delays: Vec<Duration> = (0..200).map(|_| b.delay(4, &mut rng)).collect();
        assert!(delays.iter().all(|d| *d <= b.ceiling(4)));
        // Jitter spreads retries out instead of synchronising them.
        let distinct: std::collections::BTreeSet<_> = delays.iter().collect();
        assert!(distinct.len() > 150);
    }

    #[tokio::test(start_paused = true)]
    async fn transient_failures_are_retried_and_permanent_ones_are_not() {
        let calls = AtomicU32::new(0);
        let b = Backoff::default();
        let out = retry(&b, 7, || {
            let n = calls.fetch_add(1, Ordering::SeqCst);
            async move {
                if n < 3 {
                    Err(Status::unavailable("aggregator restarting"))
                } else {
                    Ok(n)
                }
            }
        })
        .await;
        assert_eq!(out.unwrap(), 3);
        let calls = AtomicU32::new(0);
        let err = retry(&b, 7, || {
            calls.fetch_add(1, Ordering::SeqCst);
            async { Err::<(), _>(Status::invalid_argument("bad field")) }
        })
        .await
        .unwrap_err();
        assert_eq!(err.code(), Code::InvalidArgument);
        assert_eq!(calls.load(Ordering::SeqCst), 1);
        let calls = AtomicU32::new(0);
        let err = retry(&b, 7, || {
            calls.fetch_add(1, Ordering::SeqCst);
            async { Err::<(), _>(Status::unavailable("down")) }
        })
        .await
        .unwrap_err();
        assert_eq!(err.code(), Code::Unavailable);
        assert_eq!(calls.load(Ordering::SeqCst), b.max_attempts);
    }
}
