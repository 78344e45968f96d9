//! What the input-range policy (`--out-of-range clip|skip`) did to the data file, in the sheet's words:
//! a figure for the rows clipped or left out (how many of the file's rows, which rows), and a caution
//! saying what that means for the figures. It restates the report's `data.out_of_range`; a file read
//! without any row changed adds nothing.

use super::content::Figure;
use crate::certify::Report;

/// Row numbers shown before the list is cut short.
const ROWS_SHOWN: usize = 12;

/// `rows` as "rows 14, 27 and 31", at most [`ROWS_SHOWN`] of them ("…, and 9 more").
fn row_list(rows: &[usize]) -> String {
    let shown: Vec<String> = rows
        .iter()
        .take(ROWS_SHOWN)
        .map(|r| r.to_string())
        .collect();
    let word = if rows.len() == 1 { "row" } else { "rows" };
    match rows.len() {
        n if n > ROWS_SHOWN => format!("{word} {}, and {} more", shown.join(", "), n - ROWS_SHOWN),
        1 => format!("{word} {}", shown[0]),
        _ => {
            let (last, rest) = shown.split_last().expect("two or more rows");
            format!("{word} {} and {last}", rest.join(", "))
        }
    }
}

/// The figures and the caution for the rows the policy changed (empty when it changed none).
pub fn range_notes(report: &Report) -> (Vec<Figure>, Vec<String>) {
    let Some(range) = &report.data.out_of_range else {
        return (Vec::new(), Vec::new());
    };
    let mut figures = Vec::new();
    let mut cautions = Vec::new();
    let total = range.rows_in_file;
    if !range.clipped.is_empty() {
        figures.push(Figure {
            name: "Rows clipped".into(),
            value: format!("{} of {total}", range.clipped.len()),
            meaning: format!(
                "rows of the data file with values outside the model's input range, set to its nearest end before checking (--out-of-range clip): {} (header = row 1)",
                row_list(&range.clipped)
            ),
        });
        cautions.push(format!(
            "{} of the {total} rows were checked at values clipped to the model's input range, not at the values in the data file.",
            range.clipped.len()
        ));
    }
    if !range.skipped.is_empty() {
        figures.push(Figure {
            name: "Rows left out".into(),
            value: format!("{} of {total}", range.skipped.len()),
            meaning: format!(
                "rows of the data file outside the model's input range, not checked (--out-of-range skip): {} (header = row 1); sample indices count the rows kept",
                row_list(&range.skipped)
            ),
        });
        cautions.push(format!(
            "The figures describe the {} rows kept; the {} rows left out for lying outside the model's input range are in none of them.",
            total - range.skipped.len(),
            range.skipped.len()
        ));
    }
    (figures, cautions)
}

#[cfg(test)]
mod tests {
    use super::row_list;

    #[test]
    fn row_lists_read_as_words_and_are_cut_short() {
        assert_eq!(row_list(&[14]), "row 14");
        assert_eq!(row_list(&[14, 27]), "rows 14 and 27");
        assert_eq!(row_list(&[2, 3, 5]), "rows 2, 3 and 5");
        let many: Vec<usize> = (2..20).collect();
        assert_eq!(
            row_list(&many),
            "rows 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, and 6 more"
        );
    }
}
