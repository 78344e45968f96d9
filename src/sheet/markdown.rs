//! The Markdown sheet. Every string from the report is escaped with [`super::escape::markdown`]; the
//! command line sits in a code fence it cannot close. Plots are not drawn here (the tables carry the
//! same numbers); see the HTML sheet for them.

use super::content::{SheetContent, Table};
use super::escape::{code_fence, markdown as md};

/// A Markdown table with every cell escaped.
pub fn table(t: &Table) -> String {
    let mut s = String::new();
    s.push_str(&format!(
        "| {} |\n",
        t.headers
            .iter()
            .map(|h| md(h))
            .collect::<Vec<_>>()
            .join(" | ")
    ));
    s.push_str(&format!("|{}\n", " --- |".repeat(t.headers.len())));
    for row in &t.rows {
        s.push_str(&format!(
            "| {} |\n",
            row.iter().map(|c| md(c)).collect::<Vec<_>>().join(" | ")
        ));
    }
    s
}

/// Renders the sheet as Markdown.
pub fn render(c: &SheetContent) -> String {
    let mut s = format!("# {}\n\n", md(&c.title));
    s.push_str(&format!(
        "## Verdict: **{}**\n\n{}\n\n_{}._\n\n",
        md(&c.headline),
        md(&c.reason),
        md(&c.rule)
    ));
    if let Some(w) = &c.incomplete {
        s.push_str(&format!("> **Warning:** {}\n\n", md(w)));
    }
    s.push_str(&format!("## Requirement\n\n{}\n\n", md(&c.requirement)));
    for (k, v) in &c.requirement_facts {
        s.push_str(&format!("- **{}**: {}\n", md(k), md(v)));
    }
    s.push_str("\nRadius of each feature, in the input's own units:\n\n");
    s.push_str(&table(&c.budget));
    s.push('\n');
    if let Some(t) = &c.requirement_lines {
        s.push_str("Requirements (every one must pass):\n\n");
        s.push_str(&table(t));
        s.push('\n');
    }
    if let Some(l) = &c.lineage {
        s.push_str(&format!(
            "## Model lineage\n\n{}\n\n{}\n\n",
            md(&l.text),
            md(&l.this_data)
        ));
        s.push_str(&table(&l.data));
        s.push('\n');
    }
    s.push_str("## Figures\n\n| figure | value | meaning |\n| --- | --- | --- |\n");
    for f in &c.figures {
        s.push_str(&format!(
            "| {} | {} | {} |\n",
            md(&f.name),
            md(&f.value),
            md(&f.meaning)
        ));
    }
    s.push_str(&format!("\n{}\n\n", md(&c.exactness)));
    s.push_str("## Per class\n\n");
    s.push_str(&table(&c.classes));
    if let Some(t) = &c.sweep_table {
        s.push_str("\n## Robust accuracy against epsilon\n\n");
        s.push_str(&table(t));
    }
    if let Some((text, t, _)) = &c.fragility {
        s.push_str(&format!(
            "\n## Where the counterexamples moved the inputs\n\n{}\n\n",
            md(text)
        ));
        s.push_str(&table(t));
    }
    if let Some(h) = &c.histogram {
        s.push_str(&format!(
            "\n## {}\n\n| from | to | samples |\n| --- | --- | --- |\n",
            md(&h.title)
        ));
        for (k, count) in h.counts.iter().enumerate() {
            if *count > 0 {
                s.push_str(&format!(
                    "| {} | {} | {count} |\n",
                    h.edges[k],
                    h.edges[k + 1]
                ));
            }
        }
        s.push_str(&format!("\nx: {}\n", md(&h.axis)));
    }
    s.push_str("\n## Stages\n\n");
    s.push_str(&table(&c.stages));
    s.push_str("\n## Inputs and digests\n\n");
    for (k, v) in &c.inputs {
        s.push_str(&format!("- {}: {}\n", md(k), md(v)));
    }
    let fence = code_fence(&c.command);
    s.push_str(&format!(
        "\n## Reproduce\n\n{fence}sh\n{}\n{fence}\n",
        c.command.replace('\n', " ")
    ));
    s.push_str("\n## Cautions\n\n");
    for caution in &c.cautions {
        s.push_str(&format!("- {}\n", md(caution)));
    }
    s
}
