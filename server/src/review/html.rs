//! HTML building blocks of the review pages: escaping, the page frame with
//! its caution notice, and the inline style sheet. Pages load nothing from
//! the network: no scripts, no fonts, no images but inline SVG.

use std::fmt::Write;

use super::accounts::Session;
use super::charts::CHART_STYLE;

/// The style sheet, inlined in every page.
pub const STYLE: &str = include_str!("style.css");

/// Escapes text for HTML element content and quoted attribute values.
pub fn esc(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

/// The caution shown on every page, login included.
pub fn caution() -> String {
    use plimsoll_proto::caution::{TEXT, TITLE};
    let body = TEXT
        .strip_prefix(TITLE)
        .unwrap_or(TEXT)
        .trim_start_matches(['.', ' ']);
    format!(
        r#"<aside class="caution" role="note" aria-labelledby="caution-title">
<h2 id="caution-title">{}</h2>
<p>{}</p>
<p><strong>The bands:</strong> the darker band is where the model expected about half of a participant's typical days to fall, the lighter band about 95 in 100; a value outside them is unusual for this person, not necessarily abnormal.</p>
</aside>"#,
        esc(TITLE),
        esc(body)
    )
}

/// A full page: header (with the reviewer and a sign-out button when logged
/// in), breadcrumbs, the caution, then `body`.
pub fn page(title: &str, session: Option<&Session>, crumbs: &[(&str, &str)], body: &str) -> String {
    let mut out = String::with_capacity(body.len() + 8 * 1024);
    let _ = write!(
        out,
        r##"<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{title} · Plimsoll review</title>
<style>{STYLE}{CHART_STYLE}</style>
</head>
<body>
<a class="skip" href="#main">Skip to content</a>
<header class="top">
<div class="brand"><span class="mark" aria-hidden="true"></span>Plimsoll <span class="sub">flag review</span></div>
"##,
        title = esc(title)
    );
    if let Some(s) = session {
        let _ = write!(
            out,
            r#"<nav aria-label="Account" class="account"><span>Signed in as <strong>{}</strong></span>
<form method="post" action="/logout"><input type="hidden" name="csrf" value="{}"><button type="submit" class="quiet">Sign out</button></form></nav>
"#,
            esc(&s.reviewer),
            esc(&s.csrf_token)
        );
    }
    out.push_str("</header>\n");
    if !crumbs.is_empty() {
        out.push_str(r#"<nav aria-label="Breadcrumb" class="crumbs"><ol>"#);
        for (i, (label, href)) in crumbs.iter().enumerate() {
            if i + 1 == crumbs.len() {
                let _ = write!(out, r#"<li aria-current="page">{}</li>"#, esc(label));
            } else {
                let _ = write!(
                    out,
                    r#"<li><a href="{}">{}</a></li>"#,
                    esc(href),
                    esc(label)
                );
            }
        }
        out.push_str("</ol></nav>\n");
    }
    let _ = write!(
        out,
        "<main id=\"main\" tabindex=\"-1\">\n<h1>{}</h1>\n{}\n{body}\n</main>\n<footer class=\"foot\">Plimsoll aggregator · review pages are served from this machine only and load nothing from the network.</footer>\n</body>\n</html>\n",
        esc(title),
        caution()
    );
    out
}
