//! The before/after sheet of `ballast compare`: both verdicts, the figures overall and per class side by
//! side with their change, how the samples' statuses moved, a bar chart of the certified fraction per
//! class, the models and data compared, and the cautions. Rendered as Markdown and as one self-contained
//! HTML page in the look of the release sheet. It restates a [`Comparison`]; it decides nothing.

use std::path::{Path, PathBuf};

use super::bars::{bar_chart, BarChart, Series};
use super::content::Table;
use super::escape::{html as h, markdown as md};
use super::SheetError;
use crate::certify::compare::{Comparison, Figures, Side};
use crate::certify::report::{Status, Verdict};

fn percent(v: Option<f64>) -> String {
    v.map_or("–".into(), |v| format!("{:.2}%", v * 100.0))
}

fn points(before: Option<f64>, after: Option<f64>) -> String {
    match (before, after) {
        (Some(b), Some(a)) => format!("{:+.2} pp", (a - b) * 100.0),
        _ => "–".into(),
    }
}

fn count_change(before: usize, after: usize) -> String {
    format!("{:+}", after as i64 - before as i64)
}

fn verdict_word(v: Verdict) -> &'static str {
    match v {
        Verdict::Pass => "PASS",
        Verdict::Fail => "FAIL",
        Verdict::Undecided => "UNDECIDED",
        Verdict::None => "NO FLOOR",
    }
}

/// The overall table: one row per figure, before, after and the change.
pub fn overall_table(c: &Comparison) -> Table {
    let (b, a) = (&c.before.overall, &c.after.overall);
    let fraction = |name: &str, f: fn(&Figures) -> Option<f64>| {
        vec![
            name.to_string(),
            percent(f(b)),
            percent(f(a)),
            points(f(b), f(a)),
        ]
    };
    let count = |name: &str, f: fn(&Figures) -> usize| {
        vec![
            name.to_string(),
            f(b).to_string(),
            f(a).to_string(),
            count_change(f(b), f(a)),
        ]
    };
    Table {
        headers: ["figure", "before", "after", "change"]
            .map(String::from)
            .to_vec(),
        rows: vec![
            count("samples", |f| f.samples),
            fraction("clean accuracy", |f| f.clean),
            fraction("certified (lower bound)", |f| f.certified),
            fraction("empirical robust (upper bound)", |f| f.empirical),
            count("counterexamples", |f| f.counterexamples),
            count("unresolved", |f| f.unresolved),
            vec![
                "verdict".into(),
                verdict_word(c.before.verdict).into(),
                verdict_word(c.after.verdict).into(),
                String::new(),
            ],
        ],
    }
}

/// The per-class table: each figure as `before → after`, and the change in the certified fraction.
pub fn class_table(c: &Comparison) -> Table {
    let arrow = |b: String, a: String| format!("{b} → {a}");
    // Percentages without the sign (it is in the header), so the table fits the page.
    let bare = |v: Option<f64>| v.map_or("–".into(), |v| format!("{:.2}", v * 100.0));
    Table {
        headers: [
            "class",
            "samples",
            "clean %",
            "certified %",
            "certified change",
            "empirical robust %",
            "counter-examples",
            "unresolved",
        ]
        .map(String::from)
        .to_vec(),
        rows: c
            .class_names
            .iter()
            .zip(c.before.classes.iter().zip(&c.after.classes))
            .map(|(name, (b, a))| {
                vec![
                    name.clone(),
                    b.samples.to_string(),
                    arrow(bare(b.clean), bare(a.clean)),
                    arrow(bare(b.certified), bare(a.certified)),
                    points(b.certified, a.certified),
                    arrow(bare(b.empirical), bare(a.empirical)),
                    arrow(b.counterexamples.to_string(), a.counterexamples.to_string()),
                    arrow(b.unresolved.to_string(), a.unresolved.to_string()),
                ]
            })
            .collect(),
    }
}

const STATUSES: [Status; 4] = [
    Status::Certified,
    Status::Counterexample,
    Status::Misclassified,
    Status::Unresolved,
];

/// Samples by status before (rows) and after (columns).
pub fn transition_table(c: &Comparison) -> Table {
    let mut headers = vec!["before \\ after".to_string()];
    headers.extend(STATUSES.iter().map(|s| s.name().to_string()));
    Table {
        headers,
        rows: STATUSES
            .iter()
            .map(|from| {
                let mut row = vec![from.name().to_string()];
                row.extend(STATUSES.iter().map(|to| {
                    c.transitions
                        .get(&(*from, *to))
                        .copied()
                        .unwrap_or(0)
                        .to_string()
                }));
                row
            })
            .collect(),
    }
}

fn chart(c: &Comparison) -> BarChart {
    let mut rows = vec!["all samples".to_string()];
    rows.extend(c.class_names.iter().cloned());
    let values = |s: &Side| {
        std::iter::once(s.overall.certified)
            .chain(s.classes.iter().map(|f| f.certified))
            .map(|v| v.unwrap_or(0.0))
            .collect()
    };
    BarChart {
        title: "certified fraction per class, before and after".into(),
        rows,
        series: vec![
            Series {
                name: "before".into(),
                colour: "#9db4cf",
                values: values(&c.before),
            },
            Series {
                name: "after".into(),
                colour: "#1f5fa8",
                values: values(&c.after),
            },
        ],
        axis: "certified fraction (lower bound on robust accuracy)".into(),
        scale: 100.0,
        suffix: "%".into(),
        minimum_high: 1.0,
        minimum_low: 0.0,
    }
}

fn notes(c: &Comparison) -> Vec<String> {
    let mut notes = Vec::new();
    if c.same_requirement {
        notes.push(format!(
            "Both reports judged the same requirement: {}",
            c.before.requirement
        ));
    } else {
        notes.push(format!(
            "The requirements DIFFER, so a change in the figures may come from the requirement rather than the model. Before: {} After: {}",
            c.before.requirement, c.after.requirement
        ));
    }
    for (side, name) in [(&c.before, "before"), (&c.after, "after")] {
        if !side.complete {
            notes.push(format!("The {name} report is INCOMPLETE (an interrupted run): its samples not run count as unresolved."));
        }
    }
    notes.push("Certified fractions are lower and empirical fractions upper bounds on robust accuracy on this data; a model that steered its retraining with this data is optimistically biased on it (see its release sheet).".into());
    notes
}

fn inputs(c: &Comparison) -> Vec<(String, String)> {
    vec![
        (
            "Before: model".into(),
            format!("{} (SHA-256 {})", c.before.model, c.before.model_sha256),
        ),
        (
            "After: model".into(),
            format!("{} (SHA-256 {})", c.after.model, c.after.model_sha256),
        ),
        (
            "Data".into(),
            format!("{} (SHA-256 {})", c.data.0, c.data.1),
        ),
    ]
}

fn title(c: &Comparison) -> String {
    format!("Before and after: {} → {}", c.before.model, c.after.model)
}

/// The comparison as Markdown.
pub fn markdown(c: &Comparison) -> String {
    let table = super::markdown::table;
    let mut s = format!("# {}\n\n", md(&title(c)));
    s.push_str(&format!(
        "## Verdict: **{}** → **{}**\n\n",
        verdict_word(c.before.verdict),
        verdict_word(c.after.verdict)
    ));
    for n in notes(c) {
        s.push_str(&format!("- {}\n", md(&n)));
    }
    s.push_str("\n## Overall\n\n");
    s.push_str(&table(&overall_table(c)));
    s.push_str("\n## Per class\n\n");
    s.push_str(&table(&class_table(c)));
    s.push_str("\n## How the samples moved\n\nSamples by status in the first report (rows) and the second (columns).\n\n");
    s.push_str(&table(&transition_table(c)));
    s.push_str("\n## Inputs and digests\n\n");
    for (k, v) in inputs(c) {
        s.push_str(&format!("- {}: {}\n", md(&k), md(&v)));
    }
    s
}

/// The comparison as one self-contained HTML page.
pub fn html(c: &Comparison) -> String {
    let class = match c.after.verdict {
        Verdict::Pass => "pass",
        Verdict::Fail => "fail",
        Verdict::Undecided => "undecided",
        Verdict::None => "none",
    };
    let mut s = super::html::head(&title(c));
    s.push_str(&format!(
        "<div class=\"verdict {class}\"><div class=\"word\">{} → {}</div><div class=\"small\">verdict of the first report → verdict of the second</div></div>\n<ul>\n",
        verdict_word(c.before.verdict),
        verdict_word(c.after.verdict)
    ));
    for n in notes(c) {
        s.push_str(&format!("<li>{}</li>\n", h(&n)));
    }
    s.push_str("</ul>\n<h2>Overall</h2>\n");
    s.push_str(&super::html::table(&overall_table(c)));
    s.push_str("<h2>Per class</h2>\n");
    s.push_str(&bar_chart(&chart(c)));
    s.push_str(&super::html::table_of_class(&class_table(c), "compact"));
    s.push_str("<h2>How the samples moved</h2>\n<p class=\"small\">Samples by status in the first report (rows) and the second (columns); the diagonal kept its status.</p>\n");
    s.push_str(&super::html::table(&transition_table(c)));
    s.push_str("<h2>Inputs and digests</h2>\n<dl>\n");
    for (k, v) in inputs(c) {
        s.push_str(&format!(
            "<dt>{}</dt><dd><code>{}</code></dd>\n",
            h(&k),
            h(&v)
        ));
    }
    s.push_str("</dl>\n</body>\n</html>\n");
    s
}

/// Writes `sheet.md` and `sheet.html` of the comparison into `folder` (created if missing).
pub fn write_compare_sheet(
    c: &Comparison,
    folder: &Path,
) -> Result<(PathBuf, PathBuf), SheetError> {
    let output = |path: &Path, e: std::io::Error| SheetError::Output {
        path: path.display().to_string(),
        message: e.to_string(),
    };
    std::fs::create_dir_all(folder).map_err(|e| output(folder, e))?;
    let md_path = folder.join(super::MARKDOWN_FILE);
    let html_path = folder.join(super::HTML_FILE);
    crate::atomic::write_file(&md_path, markdown(c).as_bytes()).map_err(|e| output(&md_path, e))?;
    crate::atomic::write_file(&html_path, html(c).as_bytes()).map_err(|e| output(&html_path, e))?;
    Ok((md_path, html_path))
}
