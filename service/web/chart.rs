//! The 14-night chart: independent events per night for each species at a
//! site, drawn against the band of counts its baseline expects. Pure: a
//! [`NightsChart`] in, an SVG string out ([`nights_svg`]).
//!
//! The SVG stands alone: every colour and size is an attribute (no class
//! the page must style, no font, script or external reference), so the same
//! string can go into a web page or into an email body. It carries a
//! `<title>` and a `<desc>` that say the numbers in words, `role="img"` and
//! `aria-labelledby`, so a screen reader reads the same facts.
//!
//! How to read it (the legend under the panels says the same): one panel
//! per species; one column per night, oldest on the left; a bar for the
//! night's events; a pale box from the low to the high end of the band the
//! baseline expects (the central 80 % of the predictive count, see
//! docs/web.md); a short dark line at the expected count; a bar above the
//! band is drawn in the warning colour; a night with no camera effort is
//! hatched and has no band (nothing could be seen).

use crate::notify::html_escape;
use std::fmt::Write;

/// One night (a column).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct NightColumn {
    /// Short label under the column, e.g. "Tue 14".
    pub label: String,
    /// Camera-nights of effort at the site that night (0 to 1 for one camera).
    pub effort_nights: f64,
}

/// One night's numbers for one species.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize)]
pub struct NightPoint {
    /// Independent events that started in the night.
    pub count: u64,
    /// The baseline's expected count for the night's effort.
    pub expected: Option<f64>,
    /// The band of usual counts `(low, high)`, both inclusive.
    pub band: Option<(u64, u64)>,
}

/// One species (a panel).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Series {
    /// What a person reads ("wild dog").
    pub label: String,
    /// The scientific name, shown after the label when it differs.
    pub scientific_name: String,
    /// One per [`NightsChart::nights`], same order.
    pub points: Vec<NightPoint>,
}

/// Everything [`nights_svg`] draws.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct NightsChart {
    /// Said by the SVG's `<title>`, e.g. "KB-07 Swamp Corner, last 14 nights".
    pub title: String,
    /// Oldest first.
    pub nights: Vec<NightColumn>,
    pub series: Vec<Series>,
}

// Our palette: dark eucalyptus for counts, rust for "above the band",
// pale wattle for the band, charcoal for text and the expected line. Text,
// bars and the expected line reach WCAG AA contrast against the white
// ground (4.5:1 for text, 3:1 for graphics); the pale band fill does not
// and need not, as its edge line (3:1 or more) marks it and the numbers
// are also in each bar's title and the chart's description.
const INK: &str = "#23262b";
const COUNT: &str = "#2f5d50";
const ABOVE: &str = "#a2461b";
const BAND: &str = "#efe3b8";
const BAND_EDGE: &str = "#8a7228";
const GRID: &str = "#d4d6d9";
const MUTED: &str = "#5b6068";

const WIDTH: f64 = 640.0;
const LEFT: f64 = 44.0;
const RIGHT: f64 = 12.0;
const PANEL: f64 = 96.0;
const PANEL_GAP: f64 = 30.0;
const TOP: f64 = 8.0;
const AXIS: f64 = 30.0;
const LEGEND: f64 = 34.0;

/// Draws the chart as one `<svg>` element (no XML prolog). `id` makes the
/// title and description ids unique when several charts share a page.
pub fn nights_svg(chart: &NightsChart, id: &str) -> String {
    let id = id_safe(id);
    let n = chart.nights.len().max(1);
    let panels = chart.series.len();
    let height = TOP + panels as f64 * (PANEL + PANEL_GAP) + AXIS + LEGEND;
    let plot_w = WIDTH - LEFT - RIGHT;
    let col = plot_w / n as f64;
    let mut o = String::with_capacity(4096 + panels * n * 300);
    let _ = write!(
        o,
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height:.0}\" width=\"100%\" role=\"img\" aria-labelledby=\"{id}-t {id}-d\" font-family=\"sans-serif\" font-size=\"12\" data-chart=\"nights\">"
    );
    let _ = write!(
        o,
        "<title id=\"{id}-t\">{}</title><desc id=\"{id}-d\">{}</desc>",
        html_escape(&chart.title),
        html_escape(&describe(chart))
    );
    let _ = write!(
        o,
        "<defs><pattern id=\"{id}-hatch\" width=\"6\" height=\"6\" patternUnits=\"userSpaceOnUse\" patternTransform=\"rotate(45)\"><rect width=\"6\" height=\"6\" fill=\"#ffffff\"/><line x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\" stroke=\"{GRID}\" stroke-width=\"3\"/></pattern></defs>"
    );
    if panels == 0 {
        let _ = write!(
            o,
            "<text x=\"{LEFT}\" y=\"{:.0}\" fill=\"{MUTED}\">No animal events at this site in these nights or the weeks before.</text>",
            TOP + 20.0
        );
    }
    for (si, s) in chart.series.iter().enumerate() {
        let top = TOP + si as f64 * (PANEL + PANEL_GAP) + 16.0;
        let bottom = top + PANEL - 16.0;
        let max = s
            .points
            .iter()
            .map(|p| {
                let hi = p.band.map(|b| b.1).unwrap_or(0) as f64;
                let ex = p.expected.unwrap_or(0.0);
                (p.count as f64).max(hi).max(ex)
            })
            .fold(1.0_f64, f64::max)
            .ceil();
        let y = |v: f64| bottom - (v / max) * (bottom - top);
        let mut name = s.label.clone();
        if !s.scientific_name.is_empty() && s.scientific_name != s.label {
            name.push_str(&format!(" ({})", s.scientific_name));
        }
        let total: u64 = s.points.iter().map(|p| p.count).sum();
        let _ = write!(
            o,
            "<g data-series=\"{}\"><text x=\"{LEFT}\" y=\"{:.1}\" fill=\"{INK}\" font-weight=\"bold\">{} <tspan font-weight=\"normal\" fill=\"{MUTED}\">{total} {} in {n} nights</tspan></text>",
            html_escape(&s.scientific_name),
            top - 5.0,
            html_escape(&name),
            if total == 1 { "event" } else { "events" }
        );
        // Axis: 0 and the top value.
        for v in [0.0, max] {
            let _ = write!(
                o,
                "<line x1=\"{LEFT}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"{GRID}\"/><text x=\"{:.1}\" y=\"{:.1}\" fill=\"{MUTED}\" text-anchor=\"end\">{}</text>",
                WIDTH - RIGHT,
                y(v),
                y(v),
                LEFT - 6.0,
                y(v) + 4.0,
                v as u64
            );
        }
        for (i, p) in s.points.iter().enumerate().take(n) {
            let x = LEFT + i as f64 * col;
            let effort = chart.nights.get(i).map(|c| c.effort_nights).unwrap_or(0.0);
            if effort <= 0.0 {
                let _ = write!(
                    o,
                    "<rect x=\"{:.1}\" y=\"{top:.1}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"url(#{id}-hatch)\"><title>no camera effort</title></rect>",
                    x + 1.0,
                    col - 2.0,
                    bottom - top
                );
                continue;
            }
            if let Some((lo, hi)) = p.band {
                let (ylo, yhi) = (y(lo as f64), y(hi as f64));
                let _ = write!(
                    o,
                    "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"{BAND}\" stroke=\"{BAND_EDGE}\" stroke-width=\"1\"/>",
                    x + 2.0,
                    yhi,
                    col - 4.0,
                    (ylo - yhi).max(1.5)
                );
            }
            let above = p.band.is_some_and(|(_, hi)| p.count > hi);
            if p.count > 0 {
                let h = bottom - y(p.count as f64);
                let _ = write!(
                    o,
                    "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{h:.1}\" fill=\"{}\" data-count=\"{}\"><title>{}: {}</title></rect>",
                    x + col * 0.28,
                    bottom - h,
                    col * 0.44,
                    if above { ABOVE } else { COUNT },
                    p.count,
                    html_escape(chart.nights.get(i).map(|c| c.label.as_str()).unwrap_or("")),
                    night_words(p)
                );
            }
            if let Some(e) = p.expected.filter(|e| e.is_finite()) {
                let _ = write!(
                    o,
                    "<line x1=\"{:.1}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"{INK}\" stroke-width=\"2\"/>",
                    x + col * 0.18,
                    x + col * 0.82,
                    y(e.min(max)),
                    y(e.min(max))
                );
            }
        }
        o.push_str("</g>");
    }
    // Night labels under the last panel.
    let axis_y = TOP + panels as f64 * (PANEL + PANEL_GAP) + 4.0;
    for (i, c) in chart.nights.iter().enumerate() {
        let x = LEFT + (i as f64 + 0.5) * col;
        let (day, date) = c.label.split_once(' ').unwrap_or((&c.label, ""));
        let _ = write!(
            o,
            "<text x=\"{x:.1}\" y=\"{axis_y:.1}\" fill=\"{INK}\" text-anchor=\"middle\" font-size=\"11\">{}<tspan x=\"{x:.1}\" dy=\"13\">{}</tspan></text>",
            html_escape(day),
            html_escape(date)
        );
    }
    // Legend.
    let ly = axis_y + AXIS + 4.0;
    let _ = write!(
        o,
        "<g font-size=\"11\" fill=\"{INK}\"><rect x=\"{LEFT}\" y=\"{:.1}\" width=\"10\" height=\"10\" fill=\"{COUNT}\"/><text x=\"{:.1}\" y=\"{ly:.1}\">events</text><rect x=\"{:.1}\" y=\"{:.1}\" width=\"10\" height=\"10\" fill=\"{ABOVE}\"/><text x=\"{:.1}\" y=\"{ly:.1}\">above the usual band</text><rect x=\"{:.1}\" y=\"{:.1}\" width=\"14\" height=\"10\" fill=\"{BAND}\" stroke=\"{BAND_EDGE}\" stroke-width=\"1\"/><text x=\"{:.1}\" y=\"{ly:.1}\">usual band</text><line x1=\"{:.1}\" x2=\"{:.1}\" y1=\"{:.1}\" y2=\"{:.1}\" stroke=\"{INK}\" stroke-width=\"2\"/><text x=\"{:.1}\" y=\"{ly:.1}\">expected</text><rect x=\"{:.1}\" y=\"{:.1}\" width=\"14\" height=\"10\" fill=\"url(#{id}-hatch)\" stroke=\"{GRID}\"/><text x=\"{:.1}\" y=\"{ly:.1}\">no effort</text></g>",
        ly - 9.0,
        LEFT + 14.0,
        LEFT + 70.0,
        ly - 9.0,
        LEFT + 84.0,
        LEFT + 220.0,
        ly - 9.0,
        LEFT + 238.0,
        LEFT + 320.0,
        LEFT + 336.0,
        ly - 4.0,
        ly - 4.0,
        LEFT + 340.0,
        LEFT + 410.0,
        ly - 9.0,
        LEFT + 428.0,
    );
    o.push_str("</svg>");
    o
}

/// "3 events; usual 0 to 1, expected 0.4".
fn night_words(p: &NightPoint) -> String {
    let mut s = format!(
        "{} {}",
        p.count,
        if p.count == 1 { "event" } else { "events" }
    );
    if let Some((lo, hi)) = p.band {
        let _ = write!(s, "; usual {lo} to {hi}");
    }
    if let Some(e) = p.expected.filter(|e| e.is_finite()) {
        let _ = write!(s, ", expected {e:.1}");
    }
    s
}

/// The chart in words, for `<desc>`.
fn describe(chart: &NightsChart) -> String {
    if chart.series.is_empty() {
        return "No animal events in these nights.".into();
    }
    let mut parts = Vec::new();
    for s in &chart.series {
        let total: u64 = s.points.iter().map(|p| p.count).sum();
        let above: Vec<&str> = s
            .points
            .iter()
            .zip(&chart.nights)
            .filter(|(p, _)| p.band.is_some_and(|(_, hi)| p.count > hi))
            .map(|(_, c)| c.label.as_str())
            .collect();
        let mut t = format!(
            "{}: {total} {} over {} nights",
            s.label,
            if total == 1 { "event" } else { "events" },
            chart.nights.len()
        );
        if above.is_empty() {
            t.push_str(", none above the usual band");
        } else {
            let _ = write!(t, ", above the usual band on {}", above.join(", "));
        }
        parts.push(t);
    }
    let idle = chart
        .nights
        .iter()
        .filter(|c| c.effort_nights <= 0.0)
        .count();
    let mut d = parts.join(". ");
    d.push('.');
    if idle > 0 {
        let _ = write!(d, " {idle} of the nights had no camera effort.");
    }
    d
}

/// Letters, digits, `-` and `_` only (an XML id and a URL fragment).
fn id_safe(id: &str) -> String {
    let s: String = id
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' {
                c
            } else {
                '_'
            }
        })
        .collect();
    if s.is_empty() || !s.starts_with(|c: char| c.is_ascii_alphabetic()) {
        format!("c{s}")
    } else {
        s
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn chart() -> NightsChart {
        let nights = (0..14)
            .map(|i| NightColumn {
                label: format!("Mon {}", i + 1),
                effort_nights: if i == 3 { 0.0 } else { 1.0 },
            })
            .collect();
        let points = (0..14)
            .map(|i| NightPoint {
                count: match i {
                    13 => 5,
                    3 => 0,
                    _ => i % 2,
                },
                expected: Some(0.6),
                band: Some((0, 2)),
            })
            .collect();
        NightsChart {
            title: "KB-07 <Swamp> & \"Corner\", last 14 nights".into(),
            nights,
            series: vec![Series {
                label: "wild dog".into(),
                scientific_name: "Canis familiaris".into(),
                points,
            }],
        }
    }

    #[test]
    fn the_svg_is_one_element_with_escaped_text_and_its_numbers_in_words() {
        let svg = nights_svg(&chart(), "site KB-07");
        assert!(svg.starts_with("<svg xmlns=\"http://www.w3.org/2000/svg\""));
        assert!(svg.ends_with("</svg>"));
        assert_eq!(svg.matches("<svg").count(), 1);
        assert!(svg.contains("KB-07 &lt;Swamp&gt; &amp; &quot;Corner&quot;"));
        assert!(!svg.contains("<Swamp>"));
        assert!(svg.contains("aria-labelledby=\"site_KB-07-t site_KB-07-d\""));
        assert!(svg.contains("wild dog: 10 events over 14 nights, above the usual band on Mon 14."));
        assert!(svg.contains("1 of the nights had no camera effort."));
        // No reference outside the element: no http(s) link, no stylesheet.
        assert_eq!(svg.matches("http").count(), 1, "only the xmlns");
        assert!(!svg.contains("<style") && !svg.contains("<script") && !svg.contains("href"));
    }

    #[test]
    fn a_bar_above_the_band_is_drawn_in_the_warning_colour_and_idle_nights_are_hatched() {
        let svg = nights_svg(&chart(), "c");
        assert!(svg.contains(&format!("fill=\"{ABOVE}\" data-count=\"5\"")));
        assert_eq!(
            svg.matches(&format!("fill=\"{COUNT}\" data-count=\"1\""))
                .count(),
            5,
            "odd nights 1..11 but the idle night 3, drawn in the count colour"
        );
        assert!(svg.contains("<title>no camera effort</title>"));
        // 13 bands (one idle night has none) + the legend swatch.
        assert_eq!(svg.matches(&format!("fill=\"{BAND}\"")).count(), 14);
    }

    #[test]
    fn an_empty_chart_says_so() {
        let mut c = chart();
        c.series.clear();
        let svg = nights_svg(&c, "x");
        assert!(svg.contains("No animal events"));
    }
}
