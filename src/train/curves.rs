//! Small self-contained SVG line and scatter plots for training curves and trade-off figures.
//!
//! Output is plain SVG 1.1 text with no scripts or external references; non-finite points are skipped.
//! The plots only draw what they are given.

use std::fmt::Write;

/// One named series of `(x, y)` points.
#[derive(Debug, Clone, PartialEq)]
pub struct Series {
    /// Legend text.
    pub name: String,
    /// The points, in drawing order.
    pub points: Vec<(f64, f64)>,
    /// Draw markers only (a scatter) instead of a line.
    pub markers_only: bool,
}

const COLOURS: [&str; 6] = [
    "#1f5fa8", "#c4452b", "#2c8a3b", "#8a5a00", "#6b3fa0", "#555555",
];

fn escape(text: &str) -> String {
    text.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
}

/// An SVG plot (640 × 360) of `series` with a title and axis labels.
pub fn plot_svg(title: &str, x_label: &str, y_label: &str, series: &[Series]) -> String {
    let (width, height) = (640.0, 360.0);
    let (left, right, top, bottom) = (60.0, 160.0, 36.0, 48.0);
    let finite: Vec<(f64, f64)> = series
        .iter()
        .flat_map(|s| s.points.iter().copied())
        .filter(|(x, y)| x.is_finite() && y.is_finite())
        .collect();
    let (mut x0, mut x1, mut y0, mut y1) = (
        f64::INFINITY,
        f64::NEG_INFINITY,
        f64::INFINITY,
        f64::NEG_INFINITY,
    );
    for (x, y) in &finite {
        x0 = x0.min(*x);
        x1 = x1.max(*x);
        y0 = y0.min(*y);
        y1 = y1.max(*y);
    }
    if finite.is_empty() {
        (x0, x1, y0, y1) = (0.0, 1.0, 0.0, 1.0);
    }
    if x1 - x0 < 1e-12 {
        x1 = x0 + 1.0;
    }
    if y1 - y0 < 1e-12 {
        y1 = y0 + 1.0;
    }
    let plot_w = width - left - right;
    let plot_h = height - top - bottom;
    let px = |x: f64| left + (x - x0) / (x1 - x0) * plot_w;
    let py = |y: f64| top + (1.0 - (y - y0) / (y1 - y0)) * plot_h;
    let mut svg = String::new();
    let _ = writeln!(
        svg,
        r#"<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}" viewBox="0 0 {width} {height}" font-family="sans-serif" font-size="12">"#
    );
    let _ = writeln!(svg, r#"<rect width="100%" height="100%" fill="white"/>"#);
    let _ = writeln!(
        svg,
        r#"<text x="{}" y="20" font-size="14">{}</text>"#,
        left,
        escape(title)
    );
    let _ = writeln!(
        svg,
        r#"<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" stroke="gray"/>"#
    );
    for i in 0..=4 {
        let fx = x0 + (x1 - x0) * i as f64 / 4.0;
        let fy = y0 + (y1 - y0) * i as f64 / 4.0;
        let _ = writeln!(
            svg,
            r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">{:.3}</text>"#,
            px(fx),
            top + plot_h + 16.0,
            fx
        );
        let _ = writeln!(
            svg,
            r#"<text x="{:.1}" y="{:.1}" text-anchor="end">{:.3}</text>"#,
            left - 4.0,
            py(fy) + 4.0,
            fy
        );
    }
    let _ = writeln!(
        svg,
        r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
        left + plot_w / 2.0,
        height - 10.0,
        escape(x_label)
    );
    let _ = writeln!(
        svg,
        r#"<text x="14" y="{:.1}" text-anchor="middle" transform="rotate(-90 14 {:.1})">{}</text>"#,
        top + plot_h / 2.0,
        top + plot_h / 2.0,
        escape(y_label)
    );
    for (k, s) in series.iter().enumerate() {
        let colour = COLOURS[k % COLOURS.len()];
        let points: Vec<(f64, f64)> = s
            .points
            .iter()
            .copied()
            .filter(|(x, y)| x.is_finite() && y.is_finite())
            .collect();
        if s.markers_only {
            for (x, y) in &points {
                let _ = writeln!(
                    svg,
                    r#"<circle cx="{:.1}" cy="{:.1}" r="3.5" fill="{colour}"/>"#,
                    px(*x),
                    py(*y)
                );
            }
        } else if !points.is_empty() {
            let path: Vec<String> = points
                .iter()
                .map(|(x, y)| format!("{:.1},{:.1}", px(*x), py(*y)))
                .collect();
            let _ = writeln!(
                svg,
                r#"<polyline points="{}" fill="none" stroke="{colour}" stroke-width="2"/>"#,
                path.join(" ")
            );
        }
        let ly = top + 14.0 + 18.0 * k as f64;
        let _ = writeln!(
            svg,
            r#"<rect x="{:.1}" y="{:.1}" width="12" height="12" fill="{colour}"/><text x="{:.1}" y="{:.1}">{}</text>"#,
            width - right + 10.0,
            ly - 10.0,
            width - right + 28.0,
            ly,
            escape(&s.name)
        );
    }
    svg.push_str("</svg>\n");
    svg
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plot_has_one_polyline_per_line_series_and_escapes_text() {
        let svg = plot_svg(
            "a < b",
            "epoch",
            "accuracy",
            &[
                Series {
                    name: "clean".into(),
                    points: vec![(1.0, 0.5), (2.0, 0.7), (3.0, f64::NAN)],
                    markers_only: false,
                },
                Series {
                    name: "runs".into(),
                    points: vec![(0.6, 0.9)],
                    markers_only: true,
                },
            ],
        );
        assert_eq!(svg.matches("<polyline").count(), 1);
        assert_eq!(svg.matches("<circle").count(), 1);
        assert!(svg.contains("a &lt; b"));
        assert!(!svg.contains("NaN"));
    }
}
