//! Small self-contained SVG line and scatter plots for training curves and trade-off figures.
//!
//! Output is plain SVG 1.1 text with no scripts or external references; non-finite points are skipped.
//! The plots only draw what they are given: series, and reference lines ([`Guide`]) such as a floor or
//! the epoch whose weights were kept. Ticks are nice numbers, whole numbers for epochs.

use std::fmt::Write;

use crate::sheet::axis;

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

/// A reference line across the plot, with its label.
#[derive(Debug, Clone, PartialEq)]
pub enum Guide {
    /// A horizontal line at this y value (e.g. the floor).
    Horizontal {
        /// The y value.
        y: f64,
        /// Its label.
        label: String,
    },
    /// A vertical line at this x value (e.g. where the kept weights were taken).
    Vertical {
        /// The x value.
        x: f64,
        /// Its label.
        label: String,
    },
}

/// A plot: title, axis names, series, reference lines, and whether x takes whole numbers only.
#[derive(Debug, Clone, PartialEq)]
pub struct Plot<'a> {
    /// The title.
    pub title: &'a str,
    /// The x axis name.
    pub x_label: &'a str,
    /// The y axis name.
    pub y_label: &'a str,
    /// The series.
    pub series: &'a [Series],
    /// Reference lines (drawn in the axes, kept in view).
    pub guides: &'a [Guide],
    /// Ticks of the x axis at whole numbers only (epochs, rounds).
    pub integer_x: bool,
}

/// An SVG plot (640 × 360) of `series` with a title and axis labels.
pub fn plot_svg(title: &str, x_label: &str, y_label: &str, series: &[Series]) -> String {
    Plot {
        title,
        x_label,
        y_label,
        series,
        guides: &[],
        integer_x: false,
    }
    .svg()
}

impl Plot<'_> {
    /// The plot as SVG text (640 × 360): nice-number ticks on both axes
    /// ([`crate::sheet::axis`]), the axes covering every finite point and guide.
    pub fn svg(&self) -> String {
        let (width, height) = (640.0, 360.0);
        let (left, right, top, bottom) = (72.0, 160.0, 36.0, 48.0);
        let mut xs: Vec<f64> = Vec::new();
        let mut ys: Vec<f64> = Vec::new();
        for (x, y) in self.series.iter().flat_map(|s| s.points.iter().copied()) {
            if x.is_finite() && y.is_finite() {
                xs.push(x);
                ys.push(y);
            }
        }
        for g in self.guides {
            match g {
                Guide::Horizontal { y, .. } if y.is_finite() => ys.push(*y),
                Guide::Vertical { x, .. } if x.is_finite() => xs.push(*x),
                _ => {}
            }
        }
        let range = |v: &[f64]| {
            (
                v.iter().copied().fold(f64::INFINITY, f64::min),
                v.iter().copied().fold(f64::NEG_INFINITY, f64::max),
            )
        };
        let ((x0, x1), (y0, y1)) = (range(&xs), range(&ys));
        let xt = if self.integer_x {
            axis::integer_ticks(x0, x1, 6)
        } else {
            axis::nice_ticks(x0, x1, 6)
        };
        let yt = axis::nice_ticks(y0, y1, 5);
        let plot_w = width - left - right;
        let plot_h = height - top - bottom;
        let px = |x: f64| left + (x - xt.low()) / (xt.high() - xt.low()) * plot_w;
        let py = |y: f64| top + (1.0 - (y - yt.low()) / (yt.high() - yt.low())) * plot_h;
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
            escape(self.title)
        );
        let _ = writeln!(
            svg,
            r#"<rect x="{left}" y="{top}" width="{plot_w}" height="{plot_h}" fill="none" stroke="gray"/>"#
        );
        for &fx in &xt.values {
            let label = xt.label(fx);
            let _ = writeln!(
                svg,
                r##"<line x1="{x:.1}" x2="{x:.1}" y1="{}" y2="{}" stroke="#999"/><text x="{x:.1}" y="{:.1}" text-anchor="{}">{label}</text>"##,
                top + plot_h,
                top + plot_h + 4.0,
                top + plot_h + 16.0,
                axis::anchor(px(fx), label.chars().count(), left + plot_w + 20.0),
                x = px(fx),
            );
        }
        for &fy in &yt.values {
            let _ = writeln!(
                svg,
                r##"<line x1="{left}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#eee"/><text x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"##,
                left + plot_w,
                left - 4.0,
                py(fy) + 4.0,
                yt.label(fy),
                y = py(fy),
            );
        }
        let _ = writeln!(
            svg,
            r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            left + plot_w / 2.0,
            height - 10.0,
            escape(self.x_label)
        );
        let _ = writeln!(
            svg,
            r#"<text x="14" y="{:.1}" text-anchor="middle" transform="rotate(-90 14 {:.1})">{}</text>"#,
            top + plot_h / 2.0,
            top + plot_h / 2.0,
            escape(self.y_label)
        );
        let mut verticals = 0;
        for g in self.guides {
            match g {
                Guide::Horizontal { y, label } if y.is_finite() => {
                    let _ = writeln!(
                        svg,
                        r##"<line x1="{left}" x2="{:.1}" y1="{y0:.1}" y2="{y0:.1}" stroke="#b00" stroke-width="1.5" stroke-dasharray="2 3"/><text x="{:.1}" y="{:.1}" fill="#b00" text-anchor="end">{}</text>"##,
                        left + plot_w,
                        left + plot_w - 4.0,
                        py(*y) - 4.0,
                        escape(label),
                        y0 = py(*y),
                    );
                }
                Guide::Vertical { x, label } if x.is_finite() => {
                    // Labels beside the line (right of it unless that runs past the plot), one row
                    // lower for each further vertical guide so that close guides stay readable.
                    let x0 = px(*x);
                    let fits_right = x0 + 3.0 + label.chars().count() as f64 * 7.0 < left + plot_w;
                    let (tx, anchor) = if fits_right {
                        (x0 + 3.0, "start")
                    } else {
                        (x0 - 3.0, "end")
                    };
                    let _ = writeln!(
                        svg,
                        r##"<line x1="{x0:.1}" x2="{x0:.1}" y1="{top}" y2="{:.1}" stroke="#333" stroke-width="1.5" stroke-dasharray="5 3"/><text x="{tx:.1}" y="{:.1}" fill="#333" text-anchor="{anchor}">{}</text>"##,
                        top + plot_h,
                        top + 14.0 + 14.0 * verticals as f64,
                        escape(label),
                    );
                    verticals += 1;
                }
                _ => {}
            }
        }
        for (k, s) in self.series.iter().enumerate() {
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

    #[test]
    fn guides_are_drawn_and_epoch_ticks_are_whole_numbers() {
        let series = [Series {
            name: "certified".into(),
            points: (0..84)
                .map(|k| (k as f64 / 4.0, 0.5 + k as f64 / 200.0))
                .collect(),
            markers_only: false,
        }];
        let svg = Plot {
            title: "t",
            x_label: "epoch",
            y_label: "accuracy",
            series: &series,
            guides: &[
                Guide::Horizontal {
                    y: 0.8,
                    label: "floor 0.8".into(),
                },
                Guide::Vertical {
                    x: 20.75,
                    label: "kept".into(),
                },
            ],
            integer_x: true,
        }
        .svg();
        assert!(svg.contains(">floor 0.8</text>"), "{svg}");
        assert!(svg.contains(">kept</text>"), "{svg}");
        // The x tick labels (text-anchored below the axis) are whole numbers.
        let ticks: Vec<&str> = svg
            .lines()
            .filter(|l| l.contains("y=\"328.0\""))
            .filter_map(|l| l.split('>').nth(2))
            .map(|t| t.trim_end_matches("</text"))
            .collect();
        assert!(ticks.len() >= 3, "{svg}");
        assert!(ticks.iter().all(|t| t.parse::<u32>().is_ok()), "{ticks:?}");
    }
}
