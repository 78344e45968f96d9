//! Inline SVG plots for the HTML sheet: certified and empirical robust accuracy against epsilon, and a
//! histogram. Plain SVG elements only (no scripts, no external references); all text is escaped. Axes
//! carry nice-number ticks ([`super::axis`]) and a label each, and no label reaches past the picture.

use super::axis::{anchor, integer_ticks, nice_ticks, Ticks};
use super::content::{Histogram, SweepPlot};
use super::escape::html;

const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 300.0;
const LEFT: f64 = 70.0;
const RIGHT: f64 = 24.0;
const TOP: f64 = 36.0;
const BOTTOM: f64 = 50.0;
const PLOT_W: f64 = WIDTH - LEFT - RIGHT;
const PLOT_H: f64 = HEIGHT - TOP - BOTTOM;

fn open(label: &str) -> String {
    format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {HEIGHT}\" width=\"{WIDTH}\" height=\"{HEIGHT}\" role=\"img\" aria-label=\"{}\">\n<rect x=\"{LEFT}\" y=\"{TOP}\" width=\"{PLOT_W}\" height=\"{PLOT_H}\" fill=\"#fafafa\" stroke=\"#999\"/>\n",
        html(label)
    )
}

/// Horizontal grid lines and labels at the `ticks` of the y axis (`y` maps a value to its pixel row;
/// `suffix` follows each label, e.g. `%`), and the axis name written upwards beside them.
fn y_axis(
    s: &mut String,
    ticks: &Ticks,
    y: &dyn Fn(f64) -> f64,
    scale: f64,
    suffix: &str,
    name: &str,
) {
    for &v in &ticks.values {
        let label = super::axis::label(v * scale, ticks.step * scale);
        s.push_str(&format!(
            "<line x1=\"{LEFT}\" x2=\"{}\" y1=\"{y0:.1}\" y2=\"{y0:.1}\" stroke=\"#ddd\"/><text x=\"{}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"end\">{}{suffix}</text>\n",
            LEFT + PLOT_W,
            LEFT - 6.0,
            y(v) + 4.0,
            html(&label),
            y0 = y(v)
        ));
    }
    let middle = TOP + PLOT_H / 2.0;
    s.push_str(&format!(
        "<text x=\"16\" y=\"{middle:.1}\" font-size=\"12\" text-anchor=\"middle\" transform=\"rotate(-90 16 {middle:.1})\">{}</text>\n",
        html(name)
    ));
}

/// Tick marks and labels at the `ticks` of the x axis inside `[low, high]`, and the axis name below.
fn x_axis(s: &mut String, ticks: &Ticks, x: &dyn Fn(f64) -> f64, name: &str) {
    for &v in &ticks.values {
        let label = ticks.label(v);
        let x0 = x(v);
        s.push_str(&format!(
            "<line x1=\"{x0:.1}\" x2=\"{x0:.1}\" y1=\"{}\" y2=\"{}\" stroke=\"#999\"/><text x=\"{x0:.1}\" y=\"{}\" font-size=\"11\" text-anchor=\"{}\">{}</text>\n",
            TOP + PLOT_H,
            TOP + PLOT_H + 5.0,
            TOP + PLOT_H + 18.0,
            anchor(x0, label.chars().count(), WIDTH),
            html(&label),
        ));
    }
    s.push_str(&format!(
        "<text x=\"{}\" y=\"{}\" font-size=\"12\" text-anchor=\"middle\">{}</text>\n",
        LEFT + PLOT_W / 2.0,
        HEIGHT - 10.0,
        html(name)
    ));
}

/// The accuracy-versus-epsilon plot: certified (lower bound, solid), empirical (upper bound, dashed),
/// the band between them shaded, and the floor as a horizontal line.
pub fn sweep_plot(plot: &SweepPlot) -> String {
    let x_max = plot.epsilons.iter().copied().fold(0.0, f64::max);
    let x_min = plot.epsilons.iter().copied().fold(0.0, f64::min);
    let xt = nice_ticks(x_min, x_max, 6);
    let x = |e: f64| LEFT + (e - xt.low()) / (xt.high() - xt.low()) * PLOT_W;
    // The y axis runs from a nice value at or below every line (and the floor) up to 100%.
    let lowest = plot
        .certified
        .iter()
        .chain(&plot.empirical)
        .chain(plot.floor.iter())
        .copied()
        .fold(1.0, f64::min)
        .max(0.0);
    let mut yt = nice_ticks(lowest, 1.0, 5);
    yt.values.retain(|v| (0.0..=1.0).contains(v));
    let y_min = yt.low();
    let y = |a: f64| {
        TOP + (1.0 - (a.clamp(y_min, 1.0) - y_min) / (yt.high() - y_min).max(1e-12)) * PLOT_H
    };
    let mut s = open("robust accuracy against epsilon");
    y_axis(&mut s, &yt, &y, 100.0, "%", "robust accuracy");
    x_axis(&mut s, &xt, &x, "epsilon");
    let points = |values: &[f64]| -> String {
        plot.epsilons
            .iter()
            .zip(values)
            .map(|(e, a)| format!("{:.1},{:.1}", x(*e), y(*a)))
            .collect::<Vec<_>>()
            .join(" ")
    };
    let mut band: Vec<String> = plot
        .epsilons
        .iter()
        .zip(&plot.empirical)
        .map(|(e, a)| format!("{:.1},{:.1}", x(*e), y(*a)))
        .collect();
    band.extend(
        plot.epsilons
            .iter()
            .zip(&plot.certified)
            .rev()
            .map(|(e, a)| format!("{:.1},{:.1}", x(*e), y(*a))),
    );
    s.push_str(&format!(
        "<polygon points=\"{}\" fill=\"#f3d9a4\" opacity=\"0.6\"/>\n",
        band.join(" ")
    ));
    if let Some(f) = plot.floor {
        s.push_str(&format!(
            "<line x1=\"{LEFT}\" x2=\"{}\" y1=\"{y0:.1}\" y2=\"{y0:.1}\" stroke=\"#b00\" stroke-width=\"1.5\" stroke-dasharray=\"2 3\"/><text x=\"{}\" y=\"{:.1}\" font-size=\"11\" fill=\"#b00\" text-anchor=\"end\">floor {}%</text>\n",
            LEFT + PLOT_W,
            LEFT + PLOT_W - 4.0,
            y(f) - 4.0,
            html(&super::budget::significant(f * 100.0, 6)),
            y0 = y(f)
        ));
    }
    s.push_str(&format!(
        "<polyline points=\"{}\" fill=\"none\" stroke=\"#1f5fa8\" stroke-width=\"2.5\"/>\n",
        points(&plot.certified)
    ));
    s.push_str(&format!(
        "<polyline points=\"{}\" fill=\"none\" stroke=\"#c06000\" stroke-width=\"2\" stroke-dasharray=\"6 4\"/>\n",
        points(&plot.empirical)
    ));
    for (e, a) in plot.epsilons.iter().zip(&plot.certified) {
        s.push_str(&format!(
            "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"3.5\" fill=\"#1f5fa8\"/>\n",
            x(*e),
            y(*a)
        ));
    }
    for (e, a) in plot.epsilons.iter().zip(&plot.empirical) {
        s.push_str(&format!(
            "<circle cx=\"{:.1}\" cy=\"{:.1}\" r=\"3\" fill=\"#c06000\"/>\n",
            x(*e),
            y(*a)
        ));
    }
    // Legend above the plot area, clear of every line.
    let ly = TOP - 12.0;
    s.push_str(&format!(
        "<g font-size=\"11\"><line x1=\"{LEFT}\" x2=\"{}\" y1=\"{ly}\" y2=\"{ly}\" stroke=\"#1f5fa8\" stroke-width=\"2.5\"/><text x=\"{}\" y=\"{}\">certified (lower bound)</text>\
<line x1=\"{}\" x2=\"{}\" y1=\"{ly}\" y2=\"{ly}\" stroke=\"#c06000\" stroke-width=\"2\" stroke-dasharray=\"6 4\"/><text x=\"{}\" y=\"{}\">empirical (upper bound)</text></g>\n",
        LEFT + 24.0,
        LEFT + 30.0,
        ly + 4.0,
        LEFT + 190.0,
        LEFT + 214.0,
        LEFT + 220.0,
        ly + 4.0,
    ));
    s.push_str("</svg>\n");
    s
}

/// A bar histogram; the x axis spans the bin edges, both axes carry nice ticks.
pub fn histogram(h: &Histogram) -> String {
    let (low, high) = (h.edges[0], h.edges[h.edges.len() - 1]);
    let x = |v: f64| LEFT + (v - low) / (high - low).max(1e-300) * PLOT_W;
    let mut xt = nice_ticks(low, high, 6);
    xt.values.retain(|v| *v >= low && *v <= high);
    let peak = h.counts.iter().copied().max().unwrap_or(1).max(1) as f64;
    let yt = integer_ticks(0.0, peak, 5);
    let y = |c: f64| TOP + (1.0 - c / yt.high()) * PLOT_H;
    let mut s = open(&h.title);
    y_axis(&mut s, &yt, &y, 1.0, "", "samples");
    for (k, &c) in h.counts.iter().enumerate() {
        let (x0, x1) = (x(h.edges[k]), x(h.edges[k + 1]));
        s.push_str(&format!(
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"#1f5fa8\"><title>{}–{}: {c}</title></rect>\n",
            x0 + 1.0,
            y(c as f64),
            (x1 - x0 - 2.0).max(1.0),
            TOP + PLOT_H - y(c as f64),
            html(&format!("{}", h.edges[k])),
            html(&format!("{}", h.edges[k + 1]))
        ));
    }
    x_axis(&mut s, &xt, &x, &h.axis);
    s.push_str("</svg>\n");
    s
}
