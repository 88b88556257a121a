//! The review pages over real HTTP on loopback: refused access (no session,
//! wrong password, another study, missing or wrong CSRF token), reviewer
//! actions with their audit trail, the queue's order and filters, and what
//! every page carries (caution, security headers, nothing from the network).

use crate::review_support::{
    HttpResponse, OTHER_STUDY, OUTSIDER, PASSWORD, REVIEWER, ReviewFixture, STUDY, csrf_of, form,
    http, login,
};

const CAUTION: &str = "Decision support, not a diagnosis";

async fn get(f: &ReviewFixture, path: &str, cookie: Option<&str>) -> HttpResponse {
    http(f.addr(), "GET", path, cookie, None).await
}

async fn post(
    f: &ReviewFixture,
    path: &str,
    cookie: Option<&str>,
    fields: &[(&str, &str)],
) -> HttpResponse {
    http(
        f.addr(),
        "POST",
        path,
        cookie,
        Some(("application/x-www-form-urlencoded", form(fields))),
    )
    .await
}

/// Every page: the caution, strict headers, no script, nothing fetched.
fn assert_page_rules(r: &HttpResponse, what: &str) {
    assert!(r.body.contains(CAUTION), "{what}: caution missing");
    assert!(
        r.body.contains("interpret") || r.body.contains("clinical context"),
        "{what}"
    );
    let csp = r.header("content-security-policy").unwrap_or("");
    assert!(csp.contains("default-src 'none'"), "{what}: CSP {csp}");
    assert_eq!(r.header("cache-control"), Some("no-store"), "{what}");
    let lower = r.body.to_lowercase();
    assert!(!lower.contains("<script"), "{what}: has a script");
    assert!(!lower.contains("<link"), "{what}: links a resource");
    assert!(!lower.contains(" src="), "{what}: loads a resource");
    let external = lower
        .matches("http")
        .count()
        .saturating_sub(lower.matches("http://www.w3.org/2000/svg").count());
    assert_eq!(external, 0, "{what}: refers to another host");
}

#[tokio::test]
async fn no_session_is_sent_to_login() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, _, _) = f.packets;
    for path in [
        "/",
        &format!("/study/{STUDY}"),
        &format!("/study/{STUDY}/flags"),
        &format!("/flag/{alert}"),
    ] {
        for cookie in [None, Some("plimsoll_review=00ff00ff"), Some("other=1")] {
            let r = get(&f, path, cookie).await;
            assert_eq!(r.status, 303, "GET {path} with {cookie:?}");
            assert_eq!(r.header("location"), Some("/login"));
            assert!(!r.body.contains("p-017"), "no data before login");
        }
    }
    let r = post(
        &f,
        &format!("/flag/{alert}/action"),
        None,
        &[("action", "dismiss"), ("note", "x")],
    )
    .await;
    assert_eq!(r.status, 303);
    assert_eq!(r.header("location"), Some("/login"));
    let login_page = get(&f, "/login", None).await;
    assert_eq!(login_page.status, 200);
    assert_page_rules(&login_page, "login page");
    f.stop().await;
}

#[tokio::test]
async fn wrong_password_or_unknown_name_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    for (name, password) in [
        (REVIEWER, "not the password"),
        ("nobody", PASSWORD),
        (REVIEWER, ""),
    ] {
        let r = post(
            &f,
            "/login",
            None,
            &[("name", name), ("password", password)],
        )
        .await;
        assert_eq!(r.status, 401, "{name}/{password}");
        assert!(
            r.header("set-cookie").is_none(),
            "no session for a failed login"
        );
        assert!(r.body.contains("do not match"));
        assert_page_rules(&r, "failed login");
    }
    f.stop().await;
}

#[tokio::test]
async fn session_cookie_is_http_only_and_strict_and_logout_ends_it() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let r = post(
        &f,
        "/login",
        None,
        &[("name", REVIEWER), ("password", PASSWORD)],
    )
    .await;
    assert_eq!(r.status, 303);
    let set = r.header("set-cookie").unwrap();
    assert!(set.contains("HttpOnly"), "{set}");
    assert!(set.contains("SameSite=Strict"), "{set}");
    let cookie = set.split(';').next().unwrap().to_owned();
    let home = get(&f, "/", Some(&cookie)).await;
    assert_eq!(home.status, 200);
    assert_page_rules(&home, "home");
    // Logout needs the CSRF token too.
    let refused = post(&f, "/logout", Some(&cookie), &[]).await;
    assert_eq!(refused.status, 403);
    let out = post(
        &f,
        "/logout",
        Some(&cookie),
        &[("csrf", &csrf_of(&home.body))],
    )
    .await;
    assert_eq!(out.status, 303);
    assert_eq!(
        get(&f, "/", Some(&cookie)).await.status,
        303,
        "the old cookie no longer works"
    );
    f.stop().await;
}

#[tokio::test]
async fn reviewer_sees_only_assigned_studies() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, _, other) = f.packets;
    let cookie = login(f.addr(), REVIEWER, PASSWORD).await;
    let home = get(&f, "/", Some(&cookie)).await;
    assert!(home.body.contains(&format!("/study/{STUDY}")));
    assert!(!home.body.contains(OTHER_STUDY), "other study not listed");
    for path in [
        format!("/study/{OTHER_STUDY}"),
        format!("/study/{OTHER_STUDY}/flags"),
        format!("/flag/{other}"),
        "/study/no-such-study".to_owned(),
        "/flag/999999".to_owned(),
    ] {
        let r = get(&f, &path, Some(&cookie)).await;
        assert_eq!(r.status, 404, "GET {path}");
        assert!(
            !r.body.contains("q-001"),
            "nothing of the other study leaks"
        );
        assert_page_rules(&r, "not found");
    }
    // Acting on another study's flag, even with a valid token, is refused.
    let page = get(&f, &format!("/flag/{alert}"), Some(&cookie)).await;
    let csrf = csrf_of(&page.body);
    let r = post(
        &f,
        &format!("/flag/{other}/action"),
        Some(&cookie),
        &[("csrf", &csrf), ("action", "dismiss"), ("note", "not mine")],
    )
    .await;
    assert_eq!(r.status, 404);
    // The other study's reviewer sees it, with no action recorded.
    let outsider = login(f.addr(), OUTSIDER, PASSWORD).await;
    let r = get(&f, &format!("/flag/{other}"), Some(&outsider)).await;
    assert_eq!(r.status, 200);
    assert!(r.body.contains("No review action yet"));
    assert_eq!(
        get(&f, &format!("/flag/{alert}"), Some(&outsider))
            .await
            .status,
        404
    );
    f.stop().await;
}

#[tokio::test]
async fn actions_need_this_sessions_csrf_token() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, _, _) = f.packets;
    let cookie = login(f.addr(), REVIEWER, PASSWORD).await;
    let second = login(f.addr(), REVIEWER, PASSWORD).await;
    let other_csrf = csrf_of(&get(&f, "/", Some(&second)).await.body);
    let path = format!("/flag/{alert}/action");
    for token in [None, Some(""), Some("deadbeef"), Some(other_csrf.as_str())] {
        let mut fields = vec![("action", "escalate"), ("note", "forged")];
        if let Some(t) = token {
            fields.push(("csrf", t));
        }
        let r = post(&f, &path, Some(&cookie), &fields).await;
        assert_eq!(r.status, 403, "token {token:?}");
        assert_page_rules(&r, "refused action");
    }
    let page = get(&f, &format!("/flag/{alert}"), Some(&cookie)).await;
    assert!(
        page.body.contains("No review action yet"),
        "nothing was recorded"
    );
    assert!(!page.body.contains("forged"));
    f.stop().await;
}

#[tokio::test]
async fn actions_are_an_append_only_trail_and_drive_the_status() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, watch, _) = f.packets;
    let cookie = login(f.addr(), REVIEWER, PASSWORD).await;
    let queue = get(&f, &format!("/study/{STUDY}/flags"), Some(&cookie)).await;
    assert_eq!(queue.status, 200);
    assert_page_rules(&queue, "queue");
    // Alert before Watch.
    let a = queue.body.find(&format!("/flag/{alert}\"")).unwrap();
    let w = queue.body.find(&format!("/flag/{watch}\"")).unwrap();
    assert!(a < w, "alert listed first");

    let page = get(&f, &format!("/flag/{alert}"), Some(&cookie)).await;
    assert_eq!(page.status, 200);
    assert_page_rules(&page, "flag");
    assert!(page.body.contains("<svg class=\"chart\""), "chart present");
    assert!(page.body.contains("population-only 95% band"));
    assert!(page.body.contains("no measurement"), "missing days shown");
    assert!(
        page.body.contains("Overnight HRV"),
        "other signal over the window"
    );
    let csrf = csrf_of(&page.body);
    let path = format!("/flag/{alert}/action");

    // Dismissing needs a note.
    let r = post(
        &f,
        &path,
        Some(&cookie),
        &[("csrf", &csrf), ("action", "dismiss")],
    )
    .await;
    assert_eq!(r.status, 400);
    assert!(r.body.contains("a note is needed"));

    let r = post(
        &f,
        &path,
        Some(&cookie),
        &[
            ("csrf", &csrf),
            ("action", "acknowledge"),
            ("note", "seen, will call"),
        ],
    )
    .await;
    assert_eq!(r.status, 303);
    let r = post(
        &f,
        &path,
        Some(&cookie),
        &[
            ("csrf", &csrf),
            ("action", "escalate"),
            ("note", "HR still rising; to the on-call nurse"),
        ],
    )
    .await;
    assert_eq!(r.status, 303);
    let page = get(&f, &format!("/flag/{alert}"), Some(&cookie)).await;
    let history = &page.body[page.body.find("id=\"history\"").unwrap()..];
    let ack = history.find("seen, will call").unwrap();
    let esc = history.find("HR still rising").unwrap();
    assert!(ack < esc, "oldest first");
    assert_eq!(history.matches(REVIEWER).count(), 2);

    // The status is the latest action: escalated.
    let escalated = get(
        &f,
        &format!("/study/{STUDY}/flags?status=escalated"),
        Some(&cookie),
    )
    .await;
    assert!(escalated.body.contains(&format!("/flag/{alert}\"")));
    assert!(!escalated.body.contains(&format!("/flag/{watch}\"")));
    let new = get(
        &f,
        &format!("/study/{STUDY}/flags?status=new&level=watch"),
        Some(&cookie),
    )
    .await;
    assert!(new.body.contains(&format!("/flag/{watch}\"")));
    assert!(!new.body.contains(&format!("/flag/{alert}\"")));
    // By signal: the episodes that involve it (the Alert episode involves
    // resting HR and HRV, the Watch episode HRV only).
    let by_signal = get(
        &f,
        &format!("/study/{STUDY}/flags?signal=resting_hr_bpm"),
        Some(&cookie),
    )
    .await;
    assert!(by_signal.body.contains(&format!("/flag/{alert}\"")));
    assert!(!by_signal.body.contains(&format!("/flag/{watch}\"")));
    let by_signal = get(
        &f,
        &format!("/study/{STUDY}/flags?signal=hrv_rmssd_ms"),
        Some(&cookie),
    )
    .await;
    assert!(by_signal.body.contains(&format!("/flag/{alert}\"")));
    assert!(by_signal.body.contains(&format!("/flag/{watch}\"")));

    // A value the filter form does not offer is refused and named, not
    // read as "all levels" with no rows.
    for (query, named) in [
        ("level=urgent", "level `urgent`"),
        ("status=closed", "status `closed`"),
        ("signal=pulse", "signal `pulse`"),
    ] {
        let r = get(&f, &format!("/study/{STUDY}/flags?{query}"), Some(&cookie)).await;
        assert_eq!(r.status, 400, "{query}");
        assert!(r.body.contains(named), "{query}: {}", r.body);
        assert!(!r.body.contains("All levels"), "{query}");
        assert_page_rules(&r, query);
    }

    let overview = get(&f, &format!("/study/{STUDY}"), Some(&cookie)).await;
    assert_eq!(overview.status, 200);
    assert_page_rules(&overview, "overview");
    assert!(
        overview
            .body
            .contains("Participants enrolled</dt><dd>2</dd>")
    );
    assert!(overview.body.contains("Rounds run</dt><dd>3 of 3</dd>"));
    assert!(overview.body.contains("Convergence of the shared prior"));
    f.stop().await;
}
