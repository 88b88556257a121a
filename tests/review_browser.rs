//! The review pages in a real headless Chromium, driven over WebDriver
//! (Debian's `chromedriver`): log in, open the episode queue, open an
//! episode, see its signals' charts, departures, reason and the caution,
//! acknowledge it, see it in the history. Screenshots
//! go to `$CARGO_TARGET_DIR/screenshots/` (default `target/screenshots/`).
//!
//! Needs `chromium` and `chromedriver` on PATH; `scripts/install-chromium.sh`
//! installs them (Debian packages `chromium chromium-driver`).

use std::net::SocketAddr;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

use base64::Engine;
use serde_json::{Value, json};

use crate::review_support::{PASSWORD, REVIEWER, ReviewFixture, STUDY, http};

const INSTALL_HINT: &str = "the review browser test needs Chromium and its WebDriver: run \
     `scripts/install-chromium.sh` (or `apt-get install chromium chromium-driver`)";

/// WebDriver's key for an element reference (W3C WebDriver, §12.1).
const ELEMENT_KEY: &str = "element-6066-11e4-a52e-4f735466cecf";

fn find_program(names: &[&str]) -> Option<PathBuf> {
    let path = std::env::var_os("PATH")?;
    names.iter().find_map(|name| {
        std::env::split_paths(&path)
            .map(|dir| dir.join(name))
            .find(|p| p.is_file())
    })
}

fn screenshot_dir() -> PathBuf {
    let target = std::env::var_os("CARGO_TARGET_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("../target"));
    target.join("screenshots")
}

/// A chromedriver process, killed when dropped.
struct Driver {
    child: Child,
    addr: SocketAddr,
    profile: tempfile::TempDir,
}

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// One WebDriver session.
struct Browser {
    driver: Driver,
    session: String,
}

async fn wd(addr: SocketAddr, method: &str, path: &str, body: Option<Value>) -> Value {
    let r = http(
        addr,
        method,
        path,
        None,
        body.map(|b| ("application/json; charset=utf-8", b.to_string())),
    )
    .await;
    let v: Value = serde_json::from_str(&r.body)
        .unwrap_or_else(|e| panic!("WebDriver {method} {path}: not JSON ({e}): {}", r.body));
    assert!(
        r.status == 200,
        "WebDriver {method} {path} failed ({}): {}",
        r.status,
        v["value"]
    );
    v["value"].clone()
}

impl Browser {
    async fn start() -> Browser {
        let chromedriver =
            find_program(&["chromedriver"]).unwrap_or_else(|| panic!("{INSTALL_HINT}"));
        let chromium = find_program(&["chromium", "chromium-browser"])
            .unwrap_or_else(|| panic!("{INSTALL_HINT}"));
        // Ask the OS for a free port, then hand it to chromedriver.
        let port = std::net::TcpListener::bind("127.0.0.1:0")
            .unwrap()
            .local_addr()
            .unwrap()
            .port();
        let child = Command::new(&chromedriver)
            .arg(format!("--port={port}"))
            .stdout(Stdio::null())
            .stderr(Stdio::null())
            .spawn()
            .unwrap_or_else(|e| panic!("starting {}: {e}; {INSTALL_HINT}", chromedriver.display()));
        let addr: SocketAddr = format!("127.0.0.1:{port}").parse().unwrap();
        let profile = tempfile::tempdir().unwrap();
        let driver = Driver {
            child,
            addr,
            profile,
        };
        // Bounded wait for chromedriver to accept connections.
        let deadline = Instant::now() + Duration::from_secs(20);
        while tokio::net::TcpStream::connect(addr).await.is_err() {
            assert!(
                Instant::now() < deadline,
                "chromedriver did not start listening on {addr}"
            );
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let args = [
            "--headless".to_owned(),
            "--no-sandbox".to_owned(),
            "--disable-gpu".to_owned(),
            "--disable-quic".to_owned(),
            "--no-first-run".to_owned(),
            "--disable-background-networking".to_owned(),
            "--disable-component-update".to_owned(),
            "--disable-sync".to_owned(),
            "--disable-dev-shm-usage".to_owned(),
            "--window-size=1280,1000".to_owned(),
            format!("--user-data-dir={}", driver.profile.path().display()),
        ];
        let caps = json!({
            "capabilities": {
                "alwaysMatch": {
                    "browserName": "chrome",
                    "goog:chromeOptions": {
                        "binary": chromium.display().to_string(),
                        "args": args,
                    }
                }
            }
        });
        let v = wd(addr, "POST", "/session", Some(caps)).await;
        let session = v["sessionId"].as_str().expect("session id").to_owned();
        Browser { driver, session }
    }

    fn path(&self, rest: &str) -> String {
        format!("/session/{}{rest}", self.session)
    }

    async fn cmd(&self, method: &str, rest: &str, body: Option<Value>) -> Value {
        wd(self.driver.addr, method, &self.path(rest), body).await
    }

    async fn goto(&self, url: &str) {
        self.cmd("POST", "/url", Some(json!({ "url": url }))).await;
    }

    /// Waits (bounded, 10 s) until the current URL satisfies `want`, after a
    /// click that navigates: WebDriver may answer the click before the new
    /// page has committed. Returns the URL; panics with it on timeout.
    async fn url_when(&self, what: &str, want: impl Fn(&str) -> bool) -> String {
        let deadline = std::time::Instant::now() + std::time::Duration::from_secs(10);
        loop {
            let url = self.url().await;
            if want(&url) {
                return url;
            }
            assert!(
                std::time::Instant::now() < deadline,
                "URL never became {what}; still {url}"
            );
            tokio::time::sleep(std::time::Duration::from_millis(50)).await;
        }
    }

    async fn url(&self) -> String {
        self.cmd("GET", "/url", None)
            .await
            .as_str()
            .unwrap()
            .to_owned()
    }

    async fn find(&self, css: &str) -> String {
        let v = self
            .cmd(
                "POST",
                "/element",
                Some(json!({"using": "css selector", "value": css})),
            )
            .await;
        v[ELEMENT_KEY]
            .as_str()
            .unwrap_or_else(|| panic!("no element {css}"))
            .to_owned()
    }

    async fn count(&self, css: &str) -> usize {
        self.cmd(
            "POST",
            "/elements",
            Some(json!({"using": "css selector", "value": css})),
        )
        .await
        .as_array()
        .map_or(0, Vec::len)
    }

    async fn text(&self, css: &str) -> String {
        let id = self.find(css).await;
        self.cmd("GET", &format!("/element/{id}/text"), None)
            .await
            .as_str()
            .unwrap_or_default()
            .to_owned()
    }

    async fn type_into(&self, css: &str, text: &str) {
        let id = self.find(css).await;
        self.cmd(
            "POST",
            &format!("/element/{id}/value"),
            Some(json!({ "text": text })),
        )
        .await;
    }

    async fn click(&self, css: &str) {
        let id = self.find(css).await;
        self.cmd("POST", &format!("/element/{id}/click"), Some(json!({})))
            .await;
    }

    /// Presses Tab once and returns the focused element's text.
    async fn tab_and_focused_text(&self) -> String {
        let actions = json!({"actions": [{"type": "key", "id": "keyboard", "actions": [
            {"type": "keyDown", "value": "\u{E004}"}, {"type": "keyUp", "value": "\u{E004}"}
        ]}]});
        self.cmd("POST", "/actions", Some(actions)).await;
        let active = self.cmd("GET", "/element/active", None).await;
        let id = active[ELEMENT_KEY]
            .as_str()
            .expect("an element has focus")
            .to_owned();
        self.cmd("GET", &format!("/element/{id}/text"), None)
            .await
            .as_str()
            .unwrap_or_default()
            .to_owned()
    }

    async fn resize(&self, width: u32, height: u32) {
        self.cmd(
            "POST",
            "/window/rect",
            Some(json!({"width": width, "height": height})),
        )
        .await;
    }

    async fn screenshot(&self, name: &str) -> PathBuf {
        let b64 = self.cmd("GET", "/screenshot", None).await;
        let png = base64::engine::general_purpose::STANDARD
            .decode(b64.as_str().unwrap())
            .unwrap();
        assert!(png.starts_with(b"\x89PNG"), "screenshot is a PNG");
        let dir = screenshot_dir();
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join(name);
        std::fs::write(&path, png).unwrap();
        path
    }

    /// Ends the WebDriver session, which closes the browser.
    async fn quit(&self) {
        let _ = http(self.driver.addr, "DELETE", &self.path(""), None, None).await;
    }
}

#[tokio::test]
async fn reviewer_acknowledges_a_flag_in_chromium() {
    let dir = tempfile::tempdir().unwrap();
    let f = ReviewFixture::start(dir.path()).await;
    let (alert, _, _) = f.packets;
    let base = format!("http://{}", f.addr());
    let browser = std::sync::Arc::new(Browser::start().await);
    // Run the steps as their own task so the browser is closed whether they
    // pass or panic; then report their outcome.
    let b = browser.clone();
    let steps = tokio::spawn(async move { review_steps(&b, &base, alert).await });
    let outcome = steps.await;
    browser.quit().await;
    match outcome {
        Ok(shot) => assert!(shot.is_file()),
        Err(e) => std::panic::resume_unwind(e.into_panic()),
    }
    assert!(
        f.addr().ip().is_loopback(),
        "the pages were served on loopback only"
    );
    f.stop().await;
}

/// Log in, overview, queue, flag, acknowledge, history; returns the last screenshot.
async fn review_steps(b: &Browser, base: &str, alert: u64) -> PathBuf {
    // Not logged in: the browser lands on the login page, caution included.
    b.goto(&format!("{base}/study/{STUDY}/flags")).await;
    assert!(b.url().await.ends_with("/login"), "redirected to login");
    assert!(
        b.text(".caution")
            .await
            .contains("Decision support, not a diagnosis")
    );
    b.screenshot("review-1-login.png").await;

    b.type_into("#name", REVIEWER).await;
    b.type_into("#password", PASSWORD).await;
    b.click("button[type=submit]").await;
    let home = format!("{base}/");
    b.url_when("the study list", |u| u == home).await;
    assert!(b.text("main").await.contains("Studies you are assigned to"));

    // Keyboard: the first Tab stop is the skip link.
    assert_eq!(b.tab_and_focused_text().await, "Skip to content");

    b.click(&format!("a[href='/study/{STUDY}']")).await;
    let study_path = format!("/study/{STUDY}");
    b.url_when("the study overview", |u| u.ends_with(&study_path))
        .await;
    b.resize(1280, 1500).await;
    assert!(
        b.text("main")
            .await
            .contains("Shared prior, in plain units")
    );
    assert_eq!(b.count("svg.chart").await, 1, "convergence chart");
    // The lead's view: backlog, consent, completeness per participant and signal (p-017's
    // summary: 40 and 36 of 42 days; 40/42 = 95.2 %, 36/42 = 85.7 %), episodes per week.
    let backlog = b.text("#backlog").await;
    assert!(
        backlog.starts_with("2 episodes not yet reviewed, the oldest waiting"),
        "{backlog}"
    );
    assert_eq!(b.count("#participants tbody tr").await, 2);
    let p017 = b.text("#participants tbody tr:nth-child(1)").await;
    assert!(
        p017.contains("p-017") && p017.contains("42") && p017.contains("2024-04-11"),
        "{p017}"
    );
    assert!(
        p017.contains("95%") && p017.contains("86%") && p017.contains("2 (2)"),
        "{p017}"
    );
    let p018 = b.text("#participants tbody tr:nth-child(2)").await;
    assert!(
        p018.contains("no (withheld)") && p018.contains("no summary yet"),
        "{p018}"
    );
    // The scenario's episodes start on 2024-03-25 (a Monday) and 2024-04-08 (a Monday).
    let weekly = b.text("#weekly").await;
    assert!(
        weekly.contains("2024-03-25") && weekly.contains("2024-04-08"),
        "{weekly}"
    );
    b.screenshot("review-2-overview.png").await;

    // Every participant id links to their page.
    b.click("#participants a.participant").await;
    let participant_path = format!("/study/{STUDY}/participant/p-017");
    b.url_when("the participant page", |u| u.ends_with(&participant_path))
        .await;
    assert_eq!(b.count("#coverage tbody tr").await, 2, "one row per signal");
    assert!(b.text("#coverage").await.contains("2024-04-10"));
    assert_eq!(b.count("#episodes tbody tr").await, 2, "both episodes");
    b.screenshot("review-2b-participant.png").await;

    b.goto(&format!("{base}/study/{STUDY}/flags")).await;
    assert_eq!(b.count("#queue tbody tr").await, 2, "one row per episode");
    let first_row = b.text("#queue tbody tr").await;
    assert!(
        first_row.contains("Alert") && first_row.contains("p-017"),
        "{first_row}"
    );
    assert!(
        first_row.contains("2024-04-08 to 2024-04-11, ongoing")
            && first_row.contains("Overnight HRV (RMSSD) ↓ down"),
        "{first_row}"
    );
    b.resize(1280, 900).await;
    b.screenshot("review-3-queue.png").await;

    b.click("#queue tbody tr a").await;
    let flag_path = format!("/flag/{alert}");
    b.url_when("the flag page", |u| u.ends_with(&flag_path))
        .await;
    let caution = b.text(".caution").await;
    assert!(
        caution.contains("not a diagnosis")
            && caution.contains("qualified clinician")
            && caution.contains("Local protocols and regulations govern any action"),
        "{caution}"
    );
    let reason = b.text(".reason").await;
    assert!(reason.contains("resting heart rate up"), "{reason}");
    assert!(
        reason.contains("about once in 40 participant-months"),
        "{reason}"
    );
    let departures = b.text("#departures").await;
    assert!(
        departures.contains("Resting heart rate") && departures.contains("↑ up"),
        "{departures}"
    );
    assert!(
        b.count("svg.chart").await >= 2,
        "flagged signal and the other signal"
    );
    assert!(
        b.count("svg.chart path").await >= 4,
        "flagged days drawn as diamonds"
    );
    b.resize(1280, 2200).await;
    b.screenshot("review-4-flag.png").await;

    b.type_into("#note", "Reviewed with the care team; will phone today.")
        .await;
    b.click("button[value=acknowledge]").await;
    let done = format!("/flag/{alert}?done=acknowledge");
    b.url_when("the acknowledged flag", |u| u.contains(&done))
        .await;
    assert_eq!(b.text("p.notice").await, "Recorded: acknowledged.");
    let history = b.text("#history").await;
    assert!(history.contains("Acknowledged"), "{history}");
    assert!(history.contains(REVIEWER), "{history}");
    assert!(history.contains("Reviewed with the care team"), "{history}");
    b.screenshot("review-5-acknowledged.png").await
}
