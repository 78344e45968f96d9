//! Escaping of every string that comes from a model, data or report file before it enters a sheet.
//!
//! [`html`] makes text safe inside HTML element content and double-quoted attributes; [`markdown`]
//! makes text literal in Markdown (no emphasis, links, tables or raw HTML can be smuggled in);
//! [`code_fence`] picks a fence that the content cannot close. Nothing here decides what to show.

/// Escapes `& < > " '` for HTML text and attribute values.
pub fn html(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c if c.is_control() => out.push(' '),
            c => out.push(c),
        }
    }
    out
}

/// Makes text literal in Markdown: HTML-significant characters become entities, inline Markdown
/// punctuation (emphasis, code, links, the table pipe) is backslash-escaped, a leading block marker
/// (`#`, `>`, `-`, `+`, `1.`) is escaped, and line breaks become spaces.
pub fn markdown(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    let chars: Vec<char> = text.chars().collect();
    let mut only_digits = true;
    for (k, &c) in chars.iter().enumerate() {
        let ends_word = chars.get(k + 1).map(|n| n.is_whitespace()).unwrap_or(true);
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\\' | '`' | '*' | '_' | '{' | '}' | '[' | ']' | '|' | '~' => {
                out.push('\\');
                out.push(c);
            }
            '#' | '-' | '+' if k == 0 => {
                out.push('\\');
                out.push(c);
            }
            '.' | ')' if only_digits && k > 0 && ends_word => {
                out.push('\\');
                out.push(c);
            }
            c if c.is_control() => out.push(' '),
            c => out.push(c),
        }
        only_digits = only_digits && c.is_ascii_digit();
    }
    out
}

/// A backtick fence longer than any run of backticks in `content` (at least three).
pub fn code_fence(content: &str) -> String {
    let mut longest = 0;
    let mut run = 0;
    for c in content.chars() {
        if c == '`' {
            run += 1;
            longest = longest.max(run);
        } else {
            run = 0;
        }
    }
    "`".repeat((longest + 1).max(3))
}

/// Quotes one command-line argument for a POSIX shell (left bare when it is plainly safe).
pub fn shell_word(word: &str) -> String {
    let safe = !word.is_empty()
        && word
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || "-_./=:,+%@".contains(c));
    if safe {
        word.to_string()
    } else {
        format!("'{}'", word.replace('\'', "'\\''"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn html_escapes_markup() {
        assert_eq!(
            html("<script>\"a\" & 'b'</script>"),
            "&lt;script&gt;&quot;a&quot; &amp; &#39;b&#39;&lt;/script&gt;"
        );
    }

    #[test]
    fn markdown_escapes_markup_and_tables() {
        let e = markdown("a|b *c* <i>");
        assert!(!e.contains("<i>"));
        assert!(e.contains("\\|") && e.contains("\\*c\\*"));
    }

    #[test]
    fn fences_outlast_content() {
        assert_eq!(code_fence("a ```` b"), "`````");
        assert_eq!(code_fence("plain"), "```");
        assert_eq!(shell_word("it's"), "'it'\\''s'");
        assert_eq!(shell_word("--eps"), "--eps");
    }
}
