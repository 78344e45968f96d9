//! Fuzz target: any text that `Report::from_json_str` accepts must render into the Markdown and HTML
//! sheet without panicking (a saved report may be edited by hand or come from another version).
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|bytes: &[u8]| {
    let Ok(text) = std::str::from_utf8(bytes) else {
        return;
    };
    if let Ok(report) = ballast::certify::Report::from_json_str(text) {
        let content = ballast::sheet::content::build(&report);
        let markdown = ballast::sheet::markdown::render(&content);
        let html = ballast::sheet::html::render(&content);
        assert!(!markdown.is_empty() && !html.is_empty());
    }
});
