//! Failed sign-ins to the review pages over real HTTP on loopback: the
//! lockout per name and per address (429 with `Retry-After`), its growth,
//! a correct password refused during a lockout and accepted after it, many
//! guesses at once, and the login record in the database.

use std::time::Duration;

use plimsoll_server::review::limits::{self, LoginLimits};
use plimsoll_server::store::Store;

use crate::review_support::{
    HttpResponse, OUTSIDER, PASSWORD, REVIEWER, ReviewFixture, form, http,
};

async fn sign_in(f: &ReviewFixture, name: &str, password: &str) -> HttpResponse {
    http(
        f.addr(),
        "POST",
        "/login",
        None,
        Some((
            "application/x-www-form-urlencoded",
            form(&[("name", name), ("password", password)]),
        )),
    )
    .await
}

fn retry_after(r: &HttpResponse) -> u64 {
    r.header("retry-after")
        .unwrap_or_else(|| panic!("a 429 carries Retry-After: {:?}", r.headers))
        .parse()
        .expect("Retry-After in whole seconds")
}

/// Short lockouts so the test can wait them out: 3 failures per name, 1 s
/// doubling to 4 s.
fn short(account: u32, address: u32) -> LoginLimits {
    LoginLimits {
        account_free_failures: account,
        address_free_failures: address,
        first_delay: Duration::from_secs(1),
        max_delay: Duration::from_secs(4),
        forget_after: Duration::from_secs(600),
    }
}

fn events(dir: &std::path::Path) -> Vec<(String, String, String, String)> {
    let store = Store::open(&crate::support::db_location(&dir.join("agg.db"))).unwrap();
    limits::records(&store)
        .unwrap()
        .into_iter()
        .map(|r| (r.name, r.source, r.event, r.detail))
        .collect()
}

#[tokio::test]
async fn an_account_locks_with_growing_delays_and_opens_again() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start_limited(dir.path(), short(3, 100)).await;
    for k in 1..=2 {
        let r = sign_in(&f, REVIEWER, "not the password").await;
        assert_eq!(r.status, 401, "failure {k} is a plain refusal");
    }
    let third = sign_in(&f, REVIEWER, "not the password").await;
    assert_eq!(third.status, 429, "the third failure locks (limit 3)");
    assert_eq!(retry_after(&third), 1, "first delay 1 s");
    assert!(third.body.contains("Try again in 1 s"), "{}", third.body);

    // The right password during the lockout is refused without being checked.
    let during = sign_in(&f, REVIEWER, PASSWORD).await;
    assert_eq!(during.status, 429, "correct password during a lockout");
    assert!(during.header("set-cookie").is_none());
    let wait = retry_after(&during);
    assert!((1..=1).contains(&wait), "at most the 1 s lockout: {wait}");

    // Another name from the same address is not locked (address limit 100).
    assert_eq!(sign_in(&f, OUTSIDER, PASSWORD).await.status, 303);

    // After the lockout a fourth failure locks for twice as long.
    tokio::time::sleep(Duration::from_secs(wait)).await;
    let fourth = sign_in(&f, REVIEWER, "still wrong").await;
    assert_eq!(fourth.status, 429);
    assert_eq!(retry_after(&fourth), 2, "delay doubled: 2 s");

    tokio::time::sleep(Duration::from_secs(2)).await;
    let ok = sign_in(&f, REVIEWER, PASSWORD).await;
    assert_eq!(
        ok.status, 303,
        "the right password after the lockout: {}",
        ok.body
    );
    assert!(ok.header("set-cookie").is_some());

    // A success clears the name's count: one failure is a plain 401 again.
    assert_eq!(sign_in(&f, REVIEWER, "wrong").await.status, 401);

    let got = events(dir.path());
    let mine: Vec<&(String, String, String, String)> =
        got.iter().filter(|e| e.0 == REVIEWER).collect();
    let kinds: Vec<&str> = mine.iter().map(|e| e.2.as_str()).collect();
    assert_eq!(
        kinds,
        [
            "failure", "failure", "failure", "lockout", "failure", "lockout", "success", "failure"
        ],
        "refusals during a lockout are not stored"
    );
    assert!(mine.iter().all(|e| e.1 == "127.0.0.1"), "{mine:?}");
    assert_eq!(mine[3].3, "account locked for 1 s after 3 failed sign-ins");
    assert_eq!(mine[5].3, "account locked for 2 s after 4 failed sign-ins");
    f.stop().await;
}

#[tokio::test]
async fn the_address_locks_across_names() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start_limited(dir.path(), short(100, 4)).await;
    for name in [REVIEWER, OUTSIDER, "nobody", REVIEWER] {
        let r = sign_in(&f, name, "guess").await;
        assert!(r.status == 401 || r.status == 429, "{}", r.status);
    }
    let r = sign_in(&f, OUTSIDER, PASSWORD).await;
    assert_eq!(r.status, 429, "the address is locked for every name");
    let got = events(dir.path());
    let lockouts: Vec<&str> = got
        .iter()
        .filter(|e| e.2 == "lockout")
        .map(|e| e.3.as_str())
        .collect();
    assert_eq!(lockouts, ["address locked for 1 s after 4 failed sign-ins"]);
    tokio::time::sleep(Duration::from_secs(retry_after(&r))).await;
    assert_eq!(sign_in(&f, OUTSIDER, PASSWORD).await.status, 303);
    f.stop().await;
}

#[tokio::test]
async fn fifty_guesses_at_once_get_at_most_the_free_checks() {
    // The report in the issue: 50 wrong passwords in 1.5 s were all checked.
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start_limited(dir.path(), LoginLimits::default()).await;
    let free = LoginLimits::default().account_free_failures as usize;
    let guesses = (0..50).map(|k| {
        let f = &f;
        async move { sign_in(f, REVIEWER, &format!("guess-{k}")).await }
    });
    let answers = futures_join_all(guesses).await;
    let checked = answers.iter().filter(|r| r.status == 401).count();
    let limited = answers.iter().filter(|r| r.status == 429).count();
    assert_eq!(checked + limited, 50, "only 401 or 429");
    assert!(checked < free, "{checked} plain refusals, limit {free}");
    let failures = events(dir.path())
        .iter()
        .filter(|e| e.2 == "failure")
        .count();
    assert!(
        (1..=free).contains(&failures),
        "{failures} passwords checked, at most {free}"
    );
    let r = sign_in(&f, REVIEWER, PASSWORD).await;
    assert_eq!(r.status, 429, "right password straight after is refused");
    // Default first delay: 15 s (LoginLimits::default).
    assert!((1..=15).contains(&retry_after(&r)));
    f.stop().await;
}

/// Runs the futures concurrently on this task and returns their outputs in
/// order.
async fn futures_join_all<F: std::future::Future>(
    futures: impl Iterator<Item = F>,
) -> Vec<F::Output> {
    let mut set = Vec::new();
    for fut in futures {
        set.push(Box::pin(fut));
    }
    let mut out: Vec<Option<F::Output>> = (0..set.len()).map(|_| None).collect();
    std::future::poll_fn(|cx| {
        let mut pending = false;
        for (k, fut) in set.iter_mut().enumerate() {
            if out[k].is_none() {
                match fut.as_mut().poll(cx) {
                    std::task::Poll::Ready(v) => out[k] = Some(v),
                    std::task::Poll::Pending => pending = true,
                }
            }
        }
        if pending {
            std::task::Poll::Pending
        } else {
            std::task::Poll::Ready(())
        }
    })
    .await;
    out.into_iter()
        .map(|v| v.expect("every future finished"))
        .collect()
}
