//! Horizontal bar charts for the HTML sheets: one row per item (a class, a feature), one bar per series
//! (e.g. before and after), a nice-number x axis with its name, and the row labels in a left margin
//! wide enough for the longest label, so no text is clipped. Plain SVG, every string escaped.

use super::axis::{anchor, nice_ticks};
use super::escape::html;

/// One series of bars: its name (legend) and colour, one value per row.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    /// Legend text.
    pub name: String,
    /// Fill colour (`#rrggbb`).
    pub colour: &'static str,
    /// One value per row (negative values draw leftwards from 0).
    pub values: Vec<f64>,
}

/// A horizontal bar chart.
#[derive(Debug, Clone, PartialEq)]
pub struct BarChart {
    /// Accessible title.
    pub title: String,
    /// Row labels, top to bottom.
    pub rows: Vec<String>,
    /// The series, drawn in order within each row.
    pub series: Vec<Series>,
    /// Name of the x axis.
    pub axis: String,
    /// Multiply tick values by this for their labels (100 for percentages).
    pub scale: f64,
    /// Text after each tick label (`%`).
    pub suffix: String,
    /// The x axis runs at least to this value (e.g. 1 for fractions).
    pub minimum_high: f64,
    /// The x axis starts at most at this value (0, or −1 for signed fractions).
    pub minimum_low: f64,
}

const WIDTH: f64 = 640.0;
const RIGHT: f64 = 28.0;
const TOP: f64 = 30.0;
const BOTTOM: f64 = 46.0;
const BAR: f64 = 11.0;
const GAP: f64 = 8.0;
/// Approximate width of one character at font size 11 (px).
const CHAR: f64 = 6.4;

/// Renders `chart` as an inline SVG.
pub fn bar_chart(chart: &BarChart) -> String {
    let longest = chart
        .rows
        .iter()
        .map(|r| r.chars().count())
        .max()
        .unwrap_or(1);
    let left = (longest as f64 * CHAR + 14.0).clamp(60.0, 260.0);
    let plot_w = WIDTH - left - RIGHT;
    let row_h = chart.series.len() as f64 * BAR + GAP;
    let plot_h = chart.rows.len() as f64 * row_h + GAP;
    let height = TOP + plot_h + BOTTOM;
    let values = || chart.series.iter().flat_map(|s| s.values.iter().copied());
    let peak = values().fold(chart.minimum_high, f64::max);
    let low = values().fold(chart.minimum_low.min(0.0), f64::min);
    let ticks = nice_ticks(low, peak.max(low + 1e-12), 5);
    let span = (ticks.high() - ticks.low()).max(1e-300);
    let x = |v: f64| left + (v - ticks.low()) / span * plot_w;
    let mut s = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {height:.0}\" width=\"{WIDTH}\" height=\"{height:.0}\" role=\"img\" aria-label=\"{}\">\n<rect x=\"{left:.1}\" y=\"{TOP}\" width=\"{plot_w:.1}\" height=\"{plot_h:.1}\" fill=\"#fafafa\" stroke=\"#999\"/>\n",
        html(&chart.title)
    );
    for &v in &ticks.values {
        let label = format!(
            "{}{}",
            super::axis::label(v * chart.scale, ticks.step * chart.scale),
            chart.suffix
        );
        let x0 = x(v);
        s.push_str(&format!(
            "<line x1=\"{x0:.1}\" x2=\"{x0:.1}\" y1=\"{TOP}\" y2=\"{:.1}\" stroke=\"#ddd\"/><text x=\"{x0:.1}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"{}\">{}</text>\n",
            TOP + plot_h + 5.0,
            TOP + plot_h + 18.0,
            anchor(x0, label.chars().count(), WIDTH),
            html(&label)
        ));
    }
    s.push_str(&format!(
        "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"12\" text-anchor=\"middle\">{}</text>\n",
        left + plot_w / 2.0,
        height - 8.0,
        html(&chart.axis)
    ));
    for (r, label) in chart.rows.iter().enumerate() {
        let y0 = TOP + GAP + r as f64 * row_h;
        s.push_str(&format!(
            "<text x=\"{:.1}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"end\">{}</text>\n",
            left - 6.0,
            y0 + chart.series.len() as f64 * BAR / 2.0 + 4.0,
            html(label)
        ));
        for (k, series) in chart.series.iter().enumerate() {
            let v = series.values.get(r).copied().unwrap_or(0.0);
            s.push_str(&format!(
                "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{}\" fill=\"{}\"><title>{}: {}</title></rect>\n",
                x(v.min(0.0)),
                y0 + k as f64 * BAR,
                (x(v.abs().max(0.0)) - x(0.0)).max(0.5),
                BAR - 1.0,
                series.colour,
                html(&series.name),
                html(&super::budget::significant(v * chart.scale, 4))
            ));
        }
    }
    if ticks.low() < 0.0 {
        let x0 = x(0.0);
        s.push_str(&format!(
            "<line x1=\"{x0:.1}\" x2=\"{x0:.1}\" y1=\"{TOP}\" y2=\"{:.1}\" stroke=\"#555\"/>\n",
            TOP + plot_h
        ));
    }
    // Legend in the top margin, left to right.
    let mut lx = left;
    for series in &chart.series {
        s.push_str(&format!(
            "<rect x=\"{lx:.1}\" y=\"{:.1}\" width=\"12\" height=\"10\" fill=\"{}\"/><text x=\"{:.1}\" y=\"{:.1}\" font-size=\"11\">{}</text>\n",
            TOP - 19.0,
            series.colour,
            lx + 16.0,
            TOP - 10.0,
            html(&series.name)
        ));
        lx += 16.0 + series.name.chars().count() as f64 * CHAR + 18.0;
    }
    s.push_str("</svg>\n");
    s
}
