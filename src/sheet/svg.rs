//! Inline SVG plots for the HTML sheet: certified and empirical robust accuracy against epsilon, and a
//! histogram. Plain SVG elements only (no scripts, no external references); all text is escaped.

use super::content::{Histogram, SweepPlot};
use super::escape::html;

const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 300.0;
const LEFT: f64 = 60.0;
const RIGHT: f64 = 20.0;
const TOP: f64 = 36.0;
const BOTTOM: f64 = 50.0;

fn short(v: f64) -> String {
    let text = format!("{v:.4}");
    let text = text.trim_end_matches('0').trim_end_matches('.');
    if text.is_empty() || text == "-" {
        "0".into()
    } else {
        text.to_string()
    }
}

/// The accuracy-versus-epsilon plot: certified (lower bound, solid), empirical (upper bound, dashed),
/// the band between them shaded, and the floor as a horizontal line.
pub fn sweep_plot(plot: &SweepPlot) -> String {
    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let x_max = plot.epsilons.iter().copied().fold(0.0, f64::max);
    let x_min = plot
        .epsilons
        .iter()
        .copied()
        .fold(f64::INFINITY, f64::min)
        .min(0.0);
    let span = if x_max > x_min { x_max - x_min } else { 1.0 };
    let x = |e: f64| LEFT + (e - x_min) / span * plot_w;
    // The y axis runs from a round value below every line (and the floor) up to 100%.
    let lowest = plot
        .certified
        .iter()
        .chain(&plot.empirical)
        .chain(plot.floor.iter())
        .copied()
        .fold(1.0, f64::min);
    let y_min = ((lowest - 0.05) * 10.0).floor().clamp(0.0, 9.0) / 10.0;
    let y = |a: f64| TOP + (1.0 - (a.clamp(y_min, 1.0) - y_min) / (1.0 - y_min)) * plot_h;
    let mut s = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {HEIGHT}\" width=\"{WIDTH}\" height=\"{HEIGHT}\" role=\"img\" aria-label=\"robust accuracy against epsilon\">\n"
    );
    s.push_str(&format!(
        "<rect x=\"{LEFT}\" y=\"{TOP}\" width=\"{plot_w}\" height=\"{plot_h}\" fill=\"#fafafa\" stroke=\"#999\"/>\n"
    ));
    for k in 0..=4 {
        let a = y_min + (1.0 - y_min) * k as f64 / 4.0;
        s.push_str(&format!(
            "<line x1=\"{LEFT}\" x2=\"{}\" y1=\"{y0:.1}\" y2=\"{y0:.1}\" stroke=\"#ddd\"/><text x=\"{}\" y=\"{:.1}\" font-size=\"11\" text-anchor=\"end\">{}%</text>\n",
            LEFT + plot_w,
            LEFT - 6.0,
            y(a) + 4.0,
            html(&short(a * 100.0)),
            y0 = y(a)
        ));
    }
    for &e in &plot.epsilons {
        s.push_str(&format!(
            "<line x1=\"{x0:.1}\" x2=\"{x0:.1}\" y1=\"{}\" y2=\"{}\" stroke=\"#999\"/><text x=\"{x0:.1}\" y=\"{}\" font-size=\"11\" text-anchor=\"middle\">{}</text>\n",
            TOP + plot_h,
            TOP + plot_h + 5.0,
            TOP + plot_h + 18.0,
            html(&short(e)),
            x0 = x(e)
        ));
    }
    s.push_str(&format!(
        "<text x=\"{}\" y=\"{}\" font-size=\"12\" text-anchor=\"middle\">epsilon</text>\n",
        LEFT + plot_w / 2.0,
        HEIGHT - 10.0
    ));
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
            LEFT + plot_w,
            LEFT + plot_w - 4.0,
            y(f) - 4.0,
            html(&short(f * 100.0)),
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

/// A bar histogram with the bin edges on the x axis.
pub fn histogram(h: &Histogram) -> String {
    let plot_w = WIDTH - LEFT - RIGHT;
    let plot_h = HEIGHT - TOP - BOTTOM;
    let peak = h.counts.iter().copied().max().unwrap_or(1).max(1) as f64;
    let bins = h.counts.len().max(1) as f64;
    let bar_w = plot_w / bins;
    let mut s = format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {WIDTH} {HEIGHT}\" width=\"{WIDTH}\" height=\"{HEIGHT}\" role=\"img\" aria-label=\"{}\">\n",
        html(&h.title)
    );
    s.push_str(&format!(
        "<rect x=\"{LEFT}\" y=\"{TOP}\" width=\"{plot_w}\" height=\"{plot_h}\" fill=\"#fafafa\" stroke=\"#999\"/>\n"
    ));
    for (k, &c) in h.counts.iter().enumerate() {
        let bar_h = c as f64 / peak * plot_h;
        s.push_str(&format!(
            "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{:.1}\" fill=\"#1f5fa8\"><title>{}–{}: {c}</title></rect>\n",
            LEFT + k as f64 * bar_w + 1.0,
            TOP + plot_h - bar_h,
            (bar_w - 2.0).max(1.0),
            bar_h,
            html(&short(h.edges[k])),
            html(&short(h.edges[k + 1]))
        ));
    }
    for k in (0..h.edges.len()).step_by(5) {
        s.push_str(&format!(
            "<text x=\"{:.1}\" y=\"{}\" font-size=\"11\" text-anchor=\"middle\">{}</text>\n",
            LEFT + k as f64 * bar_w,
            TOP + plot_h + 16.0,
            html(&short(h.edges[k]))
        ));
    }
    s.push_str(&format!(
        "<text x=\"{}\" y=\"{}\" font-size=\"11\" text-anchor=\"end\">{}</text><text x=\"{}\" y=\"{}\" font-size=\"11\" text-anchor=\"end\">0</text>\n",
        LEFT - 6.0,
        TOP + 10.0,
        peak as usize,
        LEFT - 6.0,
        TOP + plot_h
    ));
    s.push_str(&format!(
        "<text x=\"{}\" y=\"{}\" font-size=\"12\" text-anchor=\"middle\">{}</text>\n</svg>\n",
        LEFT + plot_w / 2.0,
        HEIGHT - 10.0,
        html(&h.axis)
    ));
    s
}
