//! The HTML sheet: one self-contained file (inline CSS and SVG; no scripts, no fonts, no network). Every
//! string from the report is escaped with [`super::escape::html`].

use super::content::{SheetContent, Table};
use super::escape::html as h;
use crate::certify::report::Verdict;

const STYLE: &str = "body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:980px;margin:24px auto;padding:0 16px;color:#222;line-height:1.45}\
h1{font-size:1.5em;margin-bottom:.3em}h2{font-size:1.15em;margin-top:1.6em;border-bottom:1px solid #ddd;padding-bottom:.2em}\
.verdict{padding:14px 18px;border-radius:6px;margin:12px 0;border:2px solid}\
.verdict .word{font-size:1.8em;font-weight:700;letter-spacing:.04em}\
.pass{background:#e7f5ea;border-color:#2e7d32;color:#1b5e20}.fail{background:#fdecea;border-color:#c62828;color:#8e1c1c}\
.undecided{background:#fff6e0;border-color:#e0a000;color:#7a5200}.none{background:#eef1f5;border-color:#607080;color:#34404c}\
.warning{background:#fdecea;border-left:5px solid #c62828;padding:8px 12px;margin:12px 0}\
table{border-collapse:collapse;margin:8px 0}th,td{border:1px solid #ccc;padding:4px 10px;text-align:left;vertical-align:top}\
th{background:#f2f2f2}td.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}table.compact{font-size:.86em}\
code,pre{font-family:ui-monospace,Menlo,Consolas,monospace;font-size:.9em}pre{background:#f6f6f6;padding:10px;overflow-x:auto;white-space:pre-wrap;word-break:break-all}\
dl{display:grid;grid-template-columns:max-content 1fr;gap:2px 14px}dt{font-weight:600}dd{margin:0;word-break:break-all}.facts dd{word-break:normal}\
.cautions{background:#f6f6f6;padding:8px 20px;border-radius:6px}.small{color:#555;font-size:.9em}";

/// A cell holding only a number (signed or not), a percentage, a change in percentage points
/// (`+7.22 pp`), a count list like `289 / 37 / 34`, a change `90.00% → 93.33%`, or `–`.
fn numeric(cell: &str) -> bool {
    let unsigned = cell.strip_prefix(['+', '-']).unwrap_or(cell);
    unsigned
        .chars()
        .next()
        .is_some_and(|c| c.is_ascii_digit() || c == '–')
        && unsigned
            .chars()
            .all(|c| c.is_ascii_digit() || ".,%–-+e /p→".contains(c))
}

/// A table; cells holding only numbers are right-aligned.
pub fn table(t: &Table) -> String {
    table_of_class(t, "")
}

/// A table with a CSS class (`compact`: a smaller font for wide tables).
pub fn table_of_class(t: &Table, class: &str) -> String {
    let mut s = if class.is_empty() {
        String::from("<table>\n<tr>")
    } else {
        format!("<table class=\"{class}\">\n<tr>")
    };
    for head in &t.headers {
        s.push_str(&format!("<th>{}</th>", h(head)));
    }
    s.push_str("</tr>\n");
    for row in &t.rows {
        s.push_str("<tr>");
        for (k, cell) in row.iter().enumerate() {
            if k > 0 && numeric(cell) {
                s.push_str(&format!("<td class=\"num\">{}</td>", h(cell)));
            } else {
                s.push_str(&format!("<td>{}</td>", h(cell)));
            }
        }
        s.push_str("</tr>\n");
    }
    s.push_str("</table>\n");
    s
}

/// The document head (the sheet's style, a policy forbidding any fetch) and the title as heading.
pub fn head(title: &str) -> String {
    format!(
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; img-src data:\">\n<title>{}</title>\n<style>{STYLE}</style>\n</head>\n<body>\n<h1>{}</h1>\n",
        h(title),
        h(title)
    )
}

/// A definition list of labelled texts.
fn definitions(items: &[(String, String)]) -> String {
    let mut s = String::from("<dl class=\"facts\">\n");
    for (k, v) in items {
        s.push_str(&format!("<dt>{}</dt><dd>{}</dd>\n", h(k), h(v)));
    }
    s.push_str("</dl>\n");
    s
}

/// Renders the sheet as one self-contained HTML document.
pub fn render(c: &SheetContent) -> String {
    let class = match c.verdict {
        Verdict::Pass => "pass",
        Verdict::Fail => "fail",
        Verdict::Undecided => "undecided",
        Verdict::None => "none",
    };
    let mut s = head(&c.title);
    s.push_str(&format!(
        "<div class=\"verdict {class}\"><div class=\"word\">{}</div><div>{}</div><div class=\"small\">{}.</div></div>\n",
        h(&c.headline),
        h(&c.reason),
        h(&c.rule)
    ));
    if let Some(w) = &c.incomplete {
        s.push_str(&format!(
            "<div class=\"warning\"><strong>Warning:</strong> {}</div>\n",
            h(w)
        ));
    }
    s.push_str(&format!(
        "<h2>Requirement</h2>\n<p>{}</p>\n",
        h(&c.requirement)
    ));
    s.push_str(&definitions(&c.requirement_facts));
    s.push_str("<p>Radius of each feature, in the input's own units:</p>\n");
    s.push_str(&table(&c.budget));
    if let Some(t) = &c.requirement_lines {
        s.push_str("<p>Requirements (every one must pass):</p>\n");
        s.push_str(&table(t));
    }
    if let Some(l) = &c.lineage {
        s.push_str(&format!(
            "<h2>Model lineage</h2>\n<p>{}</p>\n<p>{}</p>\n",
            h(&l.text),
            h(&l.this_data)
        ));
        s.push_str(&table(&l.data));
    }
    s.push_str(
        "<h2>Figures</h2>\n<table>\n<tr><th>figure</th><th>value</th><th>meaning</th></tr>\n",
    );
    for f in &c.figures {
        s.push_str(&format!(
            "<tr><td>{}</td><td class=\"num\"><strong>{}</strong></td><td>{}</td></tr>\n",
            h(&f.name),
            h(&f.value),
            h(&f.meaning)
        ));
    }
    s.push_str(&format!("</table>\n<p>{}</p>\n", h(&c.exactness)));
    s.push_str("<h2>Per class</h2>\n");
    s.push_str(&table(&c.classes));
    if let (Some(t), Some(p)) = (&c.sweep_table, &c.sweep_plot) {
        s.push_str("<h2>Robust accuracy against epsilon</h2>\n<p class=\"small\">The true robust accuracy lies in the shaded band between the certified lower bound and the empirical upper bound.</p>\n");
        s.push_str(&super::svg::sweep_plot(p));
        s.push_str(&table(t));
    }
    if let Some((text, t, chart)) = &c.fragility {
        s.push_str(&format!(
            "<h2>Where the counterexamples moved the inputs</h2>\n<p class=\"small\">{}</p>\n",
            h(text)
        ));
        s.push_str(&super::bars::bar_chart(chart));
        s.push_str(&table(t));
    }
    if let Some(hist) = &c.histogram {
        s.push_str(&format!("<h2>{}</h2>\n", h(&hist.title)));
        s.push_str(&super::svg::histogram(hist));
    }
    s.push_str("<h2>Stages</h2>\n<p class=\"small\">Which stage decided how many samples, and the time spent in each (times vary between runs).</p>\n");
    s.push_str(&table(&c.stages));
    s.push_str("<h2>Inputs and digests</h2>\n<dl>\n");
    for (k, v) in &c.inputs {
        s.push_str(&format!(
            "<dt>{}</dt><dd><code>{}</code></dd>\n",
            h(k),
            h(v)
        ));
    }
    s.push_str("</dl>\n");
    s.push_str(&format!(
        "<h2>Reproduce</h2>\n<pre>{}</pre>\n",
        h(&c.command)
    ));
    s.push_str("<h2>Cautions</h2>\n<div class=\"cautions\"><ul>\n");
    for caution in &c.cautions {
        s.push_str(&format!("<li>{}</li>\n", h(caution)));
    }
    s.push_str("</ul></div>\n</body>\n</html>\n");
    s
}
