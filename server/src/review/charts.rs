//! Server-side inline SVG charts for the review pages, each with a text
//! summary (`<title>`/`<desc>`) and a data table as its text alternative.
//!
//! Colours are from the Okabe–Ito palette (Okabe & Ito 2008, "Color
//! Universal Design"), and every series also differs by shape or dash
//! pattern, so no reading depends on telling colours apart.

use std::fmt::Write;

use chrono::{Datelike, NaiveDate};

use super::html::esc;
use crate::packets::{DayStatus, FlagLevel, SignalWindow, WindowDay};

/// Okabe–Ito colours.
pub mod palette {
    pub const BLACK: &str = "#000000";
    pub const ORANGE: &str = "#E69F00";
    pub const SKY_BLUE: &str = "#56B4E9";
    pub const BLUISH_GREEN: &str = "#009E73";
    pub const YELLOW: &str = "#F0E442";
    pub const BLUE: &str = "#0072B2";
    pub const VERMILLION: &str = "#D55E00";
    pub const REDDISH_PURPLE: &str = "#CC79A7";
    /// Neutral grey for axes and missing-day marks (not a data colour).
    pub const GREY: &str = "#6b6b6b";
    /// Series colours in the order they are handed out.
    pub const SERIES: [&str; 6] = [
        BLUE,
        VERMILLION,
        BLUISH_GREEN,
        REDDISH_PURPLE,
        ORANGE,
        SKY_BLUE,
    ];
}

/// Decimals that show a difference of `span / 50` on an axis spanning `span`.
pub fn decimals_for(span: f64) -> usize {
    if !(span.is_finite() && span > 0.0) {
        return 2;
    }
    (-(span / 50.0).log10().floor()).clamp(0.0, 4.0) as usize
}

/// `v` with `decimals` decimals; never "-0" (a value that rounds to zero
/// is shown unsigned); "–" when not finite.
pub fn fmt_num(v: f64, decimals: usize) -> String {
    if !v.is_finite() {
        return "–".into();
    }
    let text = format!("{v:.decimals$}");
    match text.strip_prefix('-') {
        Some(rest) if rest.bytes().all(|b| b == b'0' || b == b'.') => rest.to_owned(),
        _ => text,
    }
}

/// A probability for display: three decimals, or "< 0.001".
pub fn fmt_p(p: f64) -> String {
    if p < 0.001 {
        "< 0.001".into()
    } else {
        format!("{p:.3}")
    }
}

/// Round step of about `span / target` (1, 2, 2.5 or 5 × 10^k).
fn nice_step(span: f64, target: f64) -> f64 {
    let raw = span / target;
    let mag = 10f64.powf(raw.log10().floor());
    let norm = raw / mag;
    let nice = if norm < 1.5 {
        1.0
    } else if norm < 2.25 {
        2.0
    } else if norm < 3.5 {
        2.5
    } else if norm < 7.5 {
        5.0
    } else {
        10.0
    };
    nice * mag
}

/// Plot geometry: data ranges mapped to SVG pixels.
struct Frame {
    width: f64,
    height: f64,
    left: f64,
    top: f64,
    plot_w: f64,
    plot_h: f64,
    x_min: f64,
    x_max: f64,
    y_min: f64,
    y_max: f64,
}

impl Frame {
    fn new(width: f64, height: f64, (x_min, x_max): (f64, f64), (lo, hi): (f64, f64)) -> Frame {
        let (left, right, top, bottom) = (64.0, 18.0, 14.0, 36.0);
        let span = (hi - lo).max(1e-9);
        Frame {
            width,
            height,
            left,
            top,
            plot_w: width - left - right,
            plot_h: height - top - bottom,
            x_min,
            x_max,
            y_min: lo - 0.06 * span,
            y_max: hi + 0.06 * span,
        }
    }

    fn x(&self, v: f64) -> f64 {
        self.left + (v - self.x_min) / (self.x_max - self.x_min).max(1e-9) * self.plot_w
    }

    fn y(&self, v: f64) -> f64 {
        self.top + (self.y_max - v) / (self.y_max - self.y_min) * self.plot_h
    }

    fn bottom(&self) -> f64 {
        self.top + self.plot_h
    }

    /// Opening tag, accessible name and description, plot background,
    /// horizontal grid lines with labels.
    ///
    /// No `xmlns`: the SVG is always inline in HTML, whose parser puts it in
    /// the SVG namespace, and the pages and report carry no URL at all.
    fn open(&self, out: &mut String, id: &str, title: &str, desc: &str, unit: &str) {
        let _ = write!(
            out,
            r#"<svg class="chart" viewBox="0 0 {w} {h}" width="100%" role="img" aria-labelledby="{id}-t {id}-d"><title id="{id}-t">{title}</title><desc id="{id}-d">{desc}</desc>"#,
            w = self.width,
            h = self.height,
            title = esc(title),
            desc = esc(desc),
        );
        let _ = write!(
            out,
            r##"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="#ffffff" stroke="#c9c6bd"/>"##,
            self.left, self.top, self.plot_w, self.plot_h
        );
        let step = nice_step(self.y_max - self.y_min, 4.0);
        let decimals = decimals_for(step * 5.0).min(3);
        let mut tick = (self.y_min / step).ceil() * step;
        while tick <= self.y_max {
            let y = self.y(tick);
            let _ = write!(
                out,
                r##"<line x1="{:.1}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="#e4e1d8"/><text x="{:.1}" y="{:.1}" class="tick" text-anchor="end">{}</text>"##,
                self.left,
                self.left + self.plot_w,
                self.left - 6.0,
                y + 4.0,
                fmt_num(tick, decimals)
            );
            tick += step;
        }
        if !unit.is_empty() {
            let _ = write!(
                out,
                r#"<text x="12" y="{:.1}" class="tick" transform="rotate(-90 12 {:.1})" text-anchor="middle">{}</text>"#,
                self.top + self.plot_h / 2.0,
                self.top + self.plot_h / 2.0,
                esc(unit)
            );
        }
    }
}

/// Runs of consecutive calendar days among `days` (sorted by date).
fn runs(days: &[WindowDay]) -> Vec<&[WindowDay]> {
    let mut out = Vec::new();
    let mut start = 0;
    for i in 1..=days.len() {
        if i == days.len() || (days[i].date - days[i - 1].date).num_days() != 1 {
            if start < i {
                out.push(&days[start..i]);
            }
            start = i;
        }
    }
    out
}

/// An episode's span on a chart, with its level.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stretch {
    pub start: NaiveDate,
    pub end: NaiveDate,
    pub level: FlagLevel,
}

/// Style rules the charts and their legend need, shared by the review pages
/// and the device's `report.html`.
pub const CHART_STYLE: &str = include_str!("chart.css");

/// A day-series chart: observed values, personalised mean with 50% and 95%
/// bands (steps, one per day; breaks where a day has no measurement),
/// missing days marked on the axis, the flagged stretch shaded, flagged days
/// as diamonds, and the population-only 95% band as dashed lines.
#[derive(Debug, Clone)]
pub struct SeriesChart<'a> {
    pub id: &'a str,
    pub title: &'a str,
    pub unit: &'a str,
    pub window: &'a SignalWindow,
    pub window_start: NaiveDate,
    pub window_end: NaiveDate,
    /// Episodes to shade, each with its level (Alert darker and solid-edged,
    /// Watch lighter and dash-edged, each labelled with its level).
    pub flagged: &'a [Stretch],
    pub height: f64,
    /// The smallest possible value of the signal ([`crate::presentation::floor_of`]):
    /// bands are drawn cut there.
    pub floor: Option<f64>,
}

impl SeriesChart<'_> {
    /// Dates of the window with no row.
    pub fn missing_dates(&self) -> Vec<NaiveDate> {
        self.window_start
            .iter_days()
            .take_while(|d| *d <= self.window_end)
            .filter(|d| !self.window.days.iter().any(|w| w.date == *d))
            .collect()
    }

    /// A value of this chart's signal as every page shows one
    /// ([`crate::presentation::fmt_signal_value`]).
    pub fn value(&self, v: f64) -> String {
        crate::presentation::fmt_signal_value(&self.window.signal, v)
    }

    /// One-sentence summary for screen readers.
    pub fn description(&self) -> String {
        let days = &self.window.days;
        let missing = self.missing_dates().len();
        let mut s = format!(
            "{} from {} to {}: {} days with a measurement, {} without.",
            self.title,
            self.window_start,
            self.window_end,
            days.len(),
            missing
        );
        for e in self.flagged {
            let _ = write!(
                s,
                " {} episode {} to {}.",
                level_text(e.level),
                e.start,
                e.end
            );
        }
        if let Some(last) = days.last() {
            let _ = write!(
                s,
                " Last measurement {}: {} {u}, expected {} {u} (95% band {} to {}).",
                last.date,
                self.value(last.observed),
                self.value(last.mean),
                self.value(last.lo95),
                self.value(last.hi95),
                u = self.unit
            );
        }
        let p = &self.window.population;
        let _ = write!(
            s,
            " Population-only 95% band {} to {} {}.",
            self.value(p.lo95),
            self.value(p.hi95),
            self.unit
        );
        if let Some(floor) = self.floor {
            let below = p.lo95 < floor || self.window.days.iter().any(|d| d.lo95 < floor);
            if below {
                let _ = write!(
                    s,
                    " Bands are drawn cut at {} {}, the smallest possible value: the model is \
                     Gaussian on the measured scale and puts a little probability below it (the \
                     table gives the model's numbers).",
                    fmt_num(floor, 0),
                    self.unit
                );
            }
        }
        s
    }

    /// A band edge as drawn: cut at the signal's floor.
    fn cut(&self, v: f64) -> f64 {
        self.floor.map_or(v, |f| v.max(f))
    }

    pub fn svg(&self) -> String {
        let n_days = (self.window_end - self.window_start).num_days() as f64 + 1.0;
        let idx = |d: NaiveDate| (d - self.window_start).num_days() as f64 + 0.5;
        let p = &self.window.population;
        let mut lo = self.cut(p.lo95);
        let mut hi = p.hi95;
        for d in &self.window.days {
            lo = lo.min(self.cut(d.lo95)).min(d.observed);
            hi = hi.max(d.hi95).max(d.observed);
        }
        let f = Frame::new(760.0, self.height, (0.0, n_days), (lo, hi));
        let cell = f.plot_w / n_days;
        let mut out = String::with_capacity(16 * 1024);
        f.open(
            &mut out,
            self.id,
            self.title,
            &self.description(),
            self.unit,
        );

        for e in self.flagged {
            let x0 = f.x(idx(e.start.max(self.window_start)) - 0.5);
            let x1 = f.x(idx(e.end.min(self.window_end)) + 0.5);
            if x1 <= x0 {
                continue;
            }
            // The label (the level, as in the legend) starts inside the stretch; where that
            // would run past the plot's right edge it ends there instead.
            const LABEL_W: f64 = 40.0;
            let (label_x, anchor) = if x0 + 3.0 + LABEL_W > f.left + f.plot_w {
                (f.left + f.plot_w - 3.0, "end")
            } else {
                (x0 + 3.0, "start")
            };
            let (opacity, dash) = stretch_look(e.level);
            let _ = write!(
                out,
                r#"<rect x="{x0:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="{}" fill-opacity="{opacity}" stroke="{}" stroke-dasharray="{dash}"/><text x="{label_x:.1}" y="{:.1}" class="tick flag-label" text-anchor="{anchor}">{}</text>"#,
                f.top,
                (x1 - x0).max(2.0),
                f.plot_h,
                palette::ORANGE,
                palette::ORANGE,
                f.top + 12.0,
                level_text(e.level)
            );
        }

        for d in self.missing_dates() {
            let x = f.x(idx(d));
            let _ = write!(
                out,
                r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="6" fill="{}"><title>{d}: no measurement</title></rect>"#,
                x - (cell * 0.35).max(1.0),
                f.bottom() - 6.0,
                (cell * 0.7).max(2.0),
                palette::GREY
            );
        }

        for run in runs(&self.window.days) {
            for (lo_of, hi_of, colour, opacity) in [
                (
                    (|d: &WindowDay| d.lo95) as fn(&WindowDay) -> f64,
                    (|d: &WindowDay| d.hi95) as fn(&WindowDay) -> f64,
                    palette::SKY_BLUE,
                    0.35,
                ),
                (|d| d.lo50, |d| d.hi50, palette::BLUE, 0.35),
            ] {
                let mut pts = String::new();
                for d in run {
                    let (x0, x1) = (f.x(idx(d.date) - 0.5), f.x(idx(d.date) + 0.5));
                    let y = f.y(self.cut(hi_of(d)));
                    let _ = write!(pts, "{x0:.1},{y:.1} {x1:.1},{y:.1} ");
                }
                for d in run.iter().rev() {
                    let (x0, x1) = (f.x(idx(d.date) - 0.5), f.x(idx(d.date) + 0.5));
                    let y = f.y(self.cut(lo_of(d)));
                    let _ = write!(pts, "{x1:.1},{y:.1} {x0:.1},{y:.1} ");
                }
                let _ = write!(
                    out,
                    r#"<polygon points="{}" fill="{colour}" fill-opacity="{opacity}"/>"#,
                    pts.trim_end()
                );
            }
            let mut pts = String::new();
            for d in run {
                let (x0, x1) = (f.x(idx(d.date) - 0.5), f.x(idx(d.date) + 0.5));
                let y = f.y(d.mean);
                let _ = write!(pts, "{x0:.1},{y:.1} {x1:.1},{y:.1} ");
            }
            let _ = write!(
                out,
                r#"<polyline points="{}" fill="none" stroke="{}" stroke-width="2"/>"#,
                pts.trim_end(),
                palette::BLUE
            );
        }

        for (v, dash) in [(p.lo95, "7 4"), (p.hi95, "7 4"), (p.mean, "2 4")] {
            let y = f.y(self.cut(v));
            let _ = write!(
                out,
                r#"<line x1="{:.1}" x2="{:.1}" y1="{y:.1}" y2="{y:.1}" stroke="{}" stroke-width="1.6" stroke-dasharray="{dash}"/>"#,
                f.left,
                f.left + f.plot_w,
                palette::REDDISH_PURPLE
            );
        }

        for d in &self.window.days {
            let (x, y) = (f.x(idx(d.date)), f.y(d.observed));
            let tip = format!(
                "{}: {} {}, expected {} (95% {} to {}), z = {:.2}",
                d.date,
                self.value(d.observed),
                self.unit,
                self.value(d.mean),
                self.value(d.lo95),
                self.value(d.hi95),
                d.z
            );
            if d.status == DayStatus::Flagged {
                let r = 6.0;
                let _ = write!(
                    out,
                    r#"<path d="M{x:.1} {:.1} L{:.1} {y:.1} L{x:.1} {:.1} L{:.1} {y:.1} Z" fill="{}" stroke="{}" stroke-width="1"><title>{} (flagged)</title></path>"#,
                    y - r,
                    x + r,
                    y + r,
                    x - r,
                    palette::VERMILLION,
                    palette::BLACK,
                    esc(&tip)
                );
            } else {
                let hollow = d.status == DayStatus::BuildingBaseline;
                let _ = write!(
                    out,
                    r#"<circle cx="{x:.1}" cy="{y:.1}" r="3.2" fill="{}" stroke="{}" stroke-width="1.2"><title>{}</title></circle>"#,
                    if hollow { "#ffffff" } else { palette::BLACK },
                    palette::BLACK,
                    esc(&tip)
                );
            }
        }

        // Date labels every whole number of weeks from the start, at most
        // about ten of them; the first label and any label in a new year
        // carry the year.
        let step_days = 7 * (n_days / 70.0).ceil().max(1.0) as i64;
        let mut day = self.window_start;
        let mut year = None;
        while day <= self.window_end {
            let x = f.x(idx(day));
            let label = if year == Some(day.year()) {
                day.format("%d %b").to_string()
            } else {
                year = Some(day.year());
                day.format("%d %b %Y").to_string()
            };
            let _ = write!(
                out,
                r##"<line x1="{x:.1}" x2="{x:.1}" y1="{:.1}" y2="{:.1}" stroke="#8a877f"/><text x="{x:.1}" y="{:.1}" class="tick" text-anchor="middle">{}</text>"##,
                f.bottom(),
                f.bottom() + 4.0,
                f.bottom() + 17.0,
                label
            );
            day += chrono::Duration::days(step_days);
        }
        out.push_str("</svg>");
        out
    }
}

/// The pooled objective per round and signal (the convergence of federated
/// training): one line per signal, distinct colour and marker shape.
#[derive(Debug, Clone)]
pub struct ConvergenceChart<'a> {
    pub id: &'a str,
    /// Signal names, in legend order.
    pub signals: &'a [String],
    /// Per round: (round id, per signal the pooled objective, if any).
    pub rounds: &'a [(u64, Vec<Option<f64>>)],
}

/// Marker of series `i` centred at (x, y), coloured `colour`.
pub fn marker(i: usize, x: f64, y: f64, colour: &str) -> String {
    let r = 4.0;
    match i % 4 {
        0 => format!(r#"<circle cx="{x:.1}" cy="{y:.1}" r="{r}" fill="{colour}"/>"#),
        1 => format!(
            r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="{colour}"/>"#,
            x - r,
            y - r,
            2.0 * r,
            2.0 * r
        ),
        2 => format!(
            r#"<path d="M{x:.1} {:.1} L{:.1} {:.1} L{:.1} {:.1} Z" fill="{colour}"/>"#,
            y - r - 1.0,
            x + r + 1.0,
            y + r,
            x - r - 1.0,
            y + r
        ),
        _ => format!(
            r#"<path d="M{x:.1} {:.1} L{:.1} {y:.1} L{x:.1} {:.1} L{:.1} {y:.1} Z" fill="{colour}"/>"#,
            y - r - 1.0,
            x + r + 1.0,
            y + r + 1.0,
            x - r - 1.0
        ),
    }
}

impl ConvergenceChart<'_> {
    pub fn svg(&self) -> String {
        let values = self.rounds.iter().flat_map(|(_, v)| v.iter().flatten());
        let (lo, hi) = values.fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), v| {
            (lo.min(*v), hi.max(*v))
        });
        let (lo, hi) = if lo.is_finite() { (lo, hi) } else { (0.0, 1.0) };
        let first = self.rounds.first().map_or(1, |r| r.0) as f64;
        let last = self.rounds.last().map_or(1, |r| r.0) as f64;
        let f = Frame::new(760.0, 240.0, (first - 0.5, last + 0.5), (lo, hi));
        let desc = format!(
            "Pooled objective (nats per day, lower is better) of the prior each round started from, for {} signals over rounds {} to {}.",
            self.signals.len(),
            first,
            last
        );
        let mut out = String::new();
        f.open(
            &mut out,
            self.id,
            "Convergence of the shared prior",
            &desc,
            "nats/day",
        );
        for (i, _) in self.signals.iter().enumerate() {
            let colour = palette::SERIES[i % palette::SERIES.len()];
            let pts: Vec<(f64, f64)> = self
                .rounds
                .iter()
                .filter_map(|(r, v)| v.get(i).copied().flatten().map(|v| (*r as f64, v)))
                .map(|(r, v)| (f.x(r), f.y(v)))
                .collect();
            let line: String = pts.iter().map(|(x, y)| format!("{x:.1},{y:.1} ")).collect();
            let _ = write!(
                out,
                r#"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="2"/>"#,
                line.trim_end()
            );
            for (x, y) in pts {
                out.push_str(&marker(i, x, y, colour));
            }
        }
        let step = nice_step(last - first + 1.0, 8.0).max(1.0);
        let mut r = first;
        while r <= last {
            let x = f.x(r);
            let _ = write!(
                out,
                r#"<text x="{x:.1}" y="{:.1}" class="tick" text-anchor="middle">{}</text>"#,
                f.bottom() + 17.0,
                r
            );
            r += step;
        }
        let _ = write!(
            out,
            r#"<text x="{:.1}" y="{:.1}" class="tick" text-anchor="end">round</text>"#,
            f.left + f.plot_w,
            f.bottom() + 32.0
        );
        out.push_str("</svg>");
        out
    }
}

fn level_text(level: FlagLevel) -> &'static str {
    match level {
        FlagLevel::Alert => "Alert",
        FlagLevel::Watch => "Watch",
    }
}

/// Fill opacity and edge dashes of an episode's shading: Alert darker with a
/// solid edge, Watch lighter with a dashed one (told apart without colour).
fn stretch_look(level: FlagLevel) -> (f64, &'static str) {
    match level {
        FlagLevel::Alert => (0.24, "none"),
        FlagLevel::Watch => (0.09, "4 3"),
    }
}

/// The legend of [`SeriesChart`], the one marker scheme of every day-series
/// chart; the episode entries only when `with_flag`.
pub fn series_legend(with_flag: bool) -> String {
    let mut out = String::from(r#"<ul class="legend" aria-hidden="true">"#);
    let item = |swatch: &str, text: &str| {
        format!(r#"<li><svg width="26" height="14" viewBox="0 0 26 14">{swatch}</svg>{text}</li>"#)
    };
    out.push_str(&item(
        &format!(
            r#"<circle cx="13" cy="7" r="3.2" fill="{}"/>"#,
            palette::BLACK
        ),
        "measured value",
    ));
    out.push_str(&item(
        &format!(
            r##"<circle cx="13" cy="7" r="3.2" fill="#fff" stroke="{}" stroke-width="1.2"/>"##,
            palette::BLACK
        ),
        "measured, baseline still building",
    ));
    if with_flag {
        out.push_str(&item(
            &format!(
                r#"<path d="M13 1 L19 7 L13 13 L7 7 Z" fill="{}" stroke="{}"/>"#,
                palette::VERMILLION,
                palette::BLACK
            ),
            "alarm day",
        ));
        for level in [FlagLevel::Alert, FlagLevel::Watch] {
            let (opacity, dash) = stretch_look(level);
            out.push_str(&item(
                &format!(
                    r#"<rect x="1" y="1" width="24" height="12" fill="{o}" fill-opacity="{opacity}" stroke="{o}" stroke-dasharray="{dash}"/>"#,
                    o = palette::ORANGE
                ),
                &format!("{} episode", level_text(level)),
            ));
        }
    }
    out.push_str(&item(
        &format!(
            r#"<line x1="1" x2="25" y1="7" y2="7" stroke="{}" stroke-width="2"/>"#,
            palette::BLUE
        ),
        "expected (personal)",
    ));
    out.push_str(&item(
        &format!(
            r#"<rect x="1" y="2" width="24" height="10" fill="{}" fill-opacity="0.6"/>"#,
            palette::BLUE
        ),
        "personal 50% band",
    ));
    out.push_str(&item(
        &format!(
            r#"<rect x="1" y="2" width="24" height="10" fill="{}" fill-opacity="0.35"/>"#,
            palette::SKY_BLUE
        ),
        "personal 95% band",
    ));
    out.push_str(&item(
        &format!(
            r#"<line x1="1" x2="25" y1="7" y2="7" stroke="{}" stroke-width="1.6" stroke-dasharray="7 4"/>"#,
            palette::REDDISH_PURPLE
        ),
        "population-only 95% band",
    ));
    out.push_str(&item(
        &format!(
            r#"<line x1="1" x2="25" y1="7" y2="7" stroke="{}" stroke-width="1.6" stroke-dasharray="2 4"/>"#,
            palette::REDDISH_PURPLE
        ),
        "population mean",
    ));
    out.push_str(&item(
        &format!(
            r#"<rect x="9" y="4" width="8" height="6" fill="{}"/>"#,
            palette::GREY
        ),
        "no measurement that day",
    ));
    out.push_str("</ul>");
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn nice_steps_are_round() {
        assert_eq!(nice_step(10.0, 4.0), 2.5);
        assert_eq!(nice_step(100.0, 4.0), 25.0);
        // 0.9 / 4 = 0.225 → 2.25 × 0.1 rounds up to 2.5 × 0.1.
        assert!((nice_step(0.9, 4.0) - 0.25).abs() < 1e-12);
        assert!((nice_step(0.8, 4.0) - 0.2).abs() < 1e-12);
    }

    #[test]
    fn numbers_never_show_minus_zero() {
        assert_eq!(fmt_num(-0.17, 0), "0");
        assert_eq!(fmt_num(-0.0, 2), "0.00");
        assert_eq!(fmt_num(-1.5, 1), "-1.5");
        assert_eq!(fmt_p(1e-6), "< 0.001");
    }

    /// A steps window over the turn of a year whose bands reach below zero,
    /// flagged on its last day.
    fn steps_chart_svg() -> (String, String) {
        use crate::packets::{DayStatus, PopulationBand, WindowDay};
        let start: NaiveDate = "2024-12-20".parse().unwrap();
        let days = (0..20)
            .map(|i| WindowDay {
                date: start + chrono::Days::new(i),
                observed: 3000.0 + 100.0 * i as f64,
                mean: 2500.0,
                sd: 1500.0,
                lo50: 1500.0,
                hi50: 3500.0,
                lo95: -440.0,
                hi95: 5440.0,
                z: 0.3,
                tail_p: 0.4,
                conditioned: true,
                status: if i >= 17 {
                    DayStatus::Flagged
                } else {
                    DayStatus::Normal
                },
            })
            .collect();
        let window = SignalWindow {
            signal: "steps".into(),
            population: PopulationBand {
                mean: 6000.0,
                lo50: 3000.0,
                hi50: 9000.0,
                lo95: -25.0,
                hi95: 12000.0,
            },
            days,
        };
        let end = start + chrono::Days::new(19);
        let chart = SeriesChart {
            id: "c",
            title: "Daily steps",
            unit: "steps",
            window: &window,
            window_start: start,
            window_end: end,
            // One day of a 20-day window is narrower than the label.
            flagged: &[Stretch {
                start: end,
                end,
                level: FlagLevel::Alert,
            }],
            height: 220.0,
            floor: crate::presentation::floor_of("steps"),
        };
        (chart.svg(), chart.description())
    }

    #[test]
    fn the_episode_label_stays_inside_when_the_stretch_ends_the_window() {
        let (svg, _) = steps_chart_svg();
        let at = svg.find(">Alert</text>").expect("episode label");
        let tag = &svg[svg[..at].rfind("<text").unwrap()..at];
        assert!(tag.contains(r#"text-anchor="end""#), "{tag}");
    }

    #[test]
    fn axis_dates_carry_the_year_first_and_when_it_changes() {
        let (svg, _) = steps_chart_svg();
        // Ticks every 7 days from 20 Dec 2024: 20 Dec 2024, 27 Dec, 03 Jan 2025.
        assert!(svg.contains(">20 Dec 2024</text>"), "first tick");
        assert!(svg.contains(">27 Dec</text>"), "same year: no year");
        assert!(svg.contains(">03 Jan 2025</text>"), "new year");
    }

    #[test]
    fn bands_are_cut_at_the_floor_and_the_description_says_so() {
        let (svg, description) = steps_chart_svg();
        assert!(description.contains("cut at 0 steps"), "{description}");
        // No tick label shows a negative step count.
        assert!(!svg.contains(">-"), "a negative label in {svg}");
    }

    #[test]
    fn decimals_follow_the_span() {
        assert_eq!(decimals_for(8000.0), 0);
        assert_eq!(decimals_for(20.0), 1);
        assert_eq!(decimals_for(2.0), 2);
    }
}
