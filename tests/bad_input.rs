//! The bad-input corpus (tests/bad-input/manifest.txt): every malformed or hostile file must make the
//! built binary exit 2 with one line `error: ...` on stderr that names the file and the place, write
//! nothing to stdout, never panic, and finish within a time and memory bound.
//!
//! The corpus is written by tests/bad-input/make_corpus.py (standard library only); this test only reads
//! the committed files. A few hostile files are made here instead of committed: sparse files that claim
//! gigabytes on disk while holding nothing.

use std::io::Read;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// Wall-clock bound per run.
const TIME_LIMIT: Duration = Duration::from_secs(10);
/// Address-space bound per run (KiB, for `ulimit -v`): far below what any claim in the corpus would need.
const MEMORY_LIMIT_KIB: u64 = 1024 * 1024;

fn corpus() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bad-input")
}

struct Run {
    code: Option<i32>,
    stdout: String,
    stderr: String,
    timed_out: bool,
}

/// Runs the binary under a memory limit and a timeout.
fn run_ballast(args: &[String]) -> Run {
    let mut child = Command::new("sh")
        .arg("-c")
        .arg(format!(
            "ulimit -v {MEMORY_LIMIT_KIB} && exec \"$0\" \"$@\""
        ))
        .arg(env!("CARGO_BIN_EXE_ballast"))
        .args(args)
        .env("RUST_BACKTRACE", "1")
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .expect("the shell starts");
    let mut out = child.stdout.take().expect("piped stdout");
    let mut err = child.stderr.take().expect("piped stderr");
    let out_reader = std::thread::spawn(move || {
        let mut s = Vec::new();
        let _ = out.read_to_end(&mut s);
        String::from_utf8_lossy(&s).into_owned()
    });
    let err_reader = std::thread::spawn(move || {
        let mut s = Vec::new();
        let _ = err.read_to_end(&mut s);
        String::from_utf8_lossy(&s).into_owned()
    });
    let start = Instant::now();
    let mut timed_out = false;
    let status = loop {
        if let Some(status) = child.try_wait().expect("wait works") {
            break status;
        }
        if start.elapsed() > TIME_LIMIT {
            timed_out = true;
            let _ = child.kill();
            break child.wait().expect("wait works");
        }
        std::thread::sleep(Duration::from_millis(5));
    };
    Run {
        code: status.code(),
        stdout: out_reader.join().expect("reader"),
        stderr: err_reader.join().expect("reader"),
        timed_out,
    }
}

/// Checks one run against the corpus contract; returns what is wrong, if anything.
fn check(run: &Run, file: &str, expected: &str) -> Option<String> {
    let mut problems = Vec::new();
    if run.timed_out {
        problems.push(format!("did not finish within {TIME_LIMIT:?}"));
    }
    if run.code != Some(2) {
        problems.push(format!("exit code {:?}, expected 2", run.code));
    }
    if run.stderr.contains("panicked") || run.stderr.contains("backtrace") {
        problems.push("panicked".into());
    }
    let lines: Vec<&str> = run.stderr.lines().collect();
    if lines.len() != 1 || !lines[0].starts_with("error: ") {
        problems.push(format!(
            "stderr is not one `error: ` line ({} lines)",
            lines.len()
        ));
    }
    if !run.stderr.contains(file) {
        problems.push(format!("message does not name the file {file}"));
    }
    if !run.stderr.contains(expected) {
        problems.push(format!("message does not contain {expected:?}"));
    }
    if !run.stdout.is_empty() {
        problems.push(format!("wrote to stdout: {:?}", run.stdout));
    }
    if problems.is_empty() {
        None
    } else {
        Some(format!(
            "{}\n    stderr: {}",
            problems.join("; "),
            run.stderr.trim_end()
        ))
    }
}

struct Case {
    file: String,
    command: String,
    expected: String,
    /// Set when the case still breaks the contract because of a known bug elsewhere.
    known_bug: Option<String>,
}

fn manifest() -> Vec<Case> {
    let text =
        std::fs::read_to_string(corpus().join("manifest.txt")).expect("manifest.txt is readable");
    text.lines()
        .filter(|l| !l.trim().is_empty() && !l.starts_with('#'))
        .map(|line| {
            let parts: Vec<&str> = line.split(" | ").collect();
            assert!(
                parts.len() == 3 || (parts.len() == 4 && parts[3].starts_with("known bug: ")),
                "manifest line is `file | command | expected [| known bug: ...]`: {line}"
            );
            Case {
                file: parts[0].trim().to_owned(),
                command: parts[1].trim().to_owned(),
                expected: parts[2].trim().to_owned(),
                known_bug: parts.get(3).map(|b| b.trim().to_owned()),
            }
        })
        .collect()
}

/// The command of a case with its placeholders filled in.
fn arguments(command: &str, bad: &Path, out: &Path) -> Vec<String> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let good = corpus().join("good");
    let places = [
        ("{bad}", bad.to_path_buf()),
        ("{digits}", root.join("tests/data/digits_mlp.model.json")),
        ("{digits_data}", root.join("tests/data/digits_test.csv")),
        ("{plain}", good.join("plain3.model.json")),
        ("{plain_data}", good.join("plain3.csv")),
        ("{named}", good.join("two_sensor.model.json")),
        ("{named_data}", good.join("two_sensor.csv")),
        ("{out}", out.to_path_buf()),
    ];
    command
        .split_whitespace()
        .map(|word| {
            let mut word = word.to_owned();
            for (placeholder, path) in &places {
                word = word.replace(placeholder, &path.display().to_string());
            }
            assert!(!word.contains('{'), "unknown placeholder in {command}");
            word
        })
        .collect()
}

/// Files and folders anywhere under `folder`.
fn everything_under(folder: &Path) -> Vec<PathBuf> {
    let mut found = Vec::new();
    let mut pending = vec![folder.to_path_buf()];
    while let Some(next) = pending.pop() {
        for entry in std::fs::read_dir(&next).expect("readable folder") {
            let path = entry.expect("entry").path();
            if path.is_dir() {
                pending.push(path.clone());
            }
            found.push(path);
        }
    }
    found.sort();
    found
}

#[test]
fn every_corpus_file_fails_cleanly() {
    let cases = manifest();
    assert!(
        cases.len() >= 40,
        "the corpus has only {} cases",
        cases.len()
    );
    let mut failures = Vec::new();
    let mut known_bugs = 0;
    for case in &cases {
        let bad = corpus().join(&case.file);
        assert!(bad.is_file(), "manifest names a missing file {}", case.file);
        let out = tempfile::tempdir().expect("temporary folder");
        let run = run_ballast(&arguments(&case.command, &bad, out.path()));
        let mut problem = check(&run, &bad.display().to_string(), &case.expected);
        let written = everything_under(out.path());
        if !written.is_empty() {
            problem = Some(format!("wrote into the output folder: {written:?}"));
        }
        match (&case.known_bug, problem) {
            (None, Some(problem)) => {
                failures.push(format!("{} ({}): {problem}", case.file, case.command))
            }
            (Some(_), None) => failures.push(format!(
                "{}: listed as a known bug but now passes; move it into CASES in make_corpus.py",
                case.file
            )),
            (Some(bug), Some(problem)) => {
                known_bugs += 1;
                eprintln!("{} still fails ({bug}): {problem}", case.file);
            }
            (None, None) => {}
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n")
    );
    eprintln!("{} cases, {known_bugs} known bugs", cases.len());
}

#[test]
fn every_corpus_file_is_in_the_manifest() {
    // No case may sit in the corpus unrun: each file under model/, data/ (and any other case folder)
    // must be listed. good/ holds the valid models the commands pair with the bad files.
    let listed: std::collections::HashSet<String> =
        manifest().into_iter().map(|c| c.file).collect();
    let mut unlisted = Vec::new();
    for folder in std::fs::read_dir(corpus()).expect("corpus folder") {
        let folder = folder.expect("entry").path();
        if !folder.is_dir() || folder.file_name().is_some_and(|n| n == "good") {
            continue;
        }
        for file in std::fs::read_dir(&folder).expect("case folder") {
            let file = file.expect("entry").path();
            let relative = file
                .strip_prefix(corpus())
                .expect("inside corpus")
                .display()
                .to_string();
            if !listed.contains(&relative) {
                unlisted.push(relative);
            }
        }
    }
    assert!(
        unlisted.is_empty(),
        "corpus files missing from manifest.txt: {unlisted:?}"
    );
}

#[test]
fn the_good_partners_are_accepted() {
    // The bad data files are only meaningful if the models they are paired with load: a broken partner
    // would make every data case pass for the wrong reason.
    for model in ["good/plain3.model.json", "good/two_sensor.model.json"] {
        let run = run_ballast(&["inspect".into(), corpus().join(model).display().to_string()]);
        assert_eq!(run.code, Some(0), "{model}: {}", run.stderr);
        assert!(
            run.stdout.contains("parameters:"),
            "{model}: {}",
            run.stdout
        );
    }
}

/// A sparse file of `bytes` bytes that occupies almost nothing on disk.
fn sparse_file(folder: &Path, name: &str, bytes: u64, head: &[u8]) -> PathBuf {
    let path = folder.join(name);
    let mut file = std::fs::File::create(&path).expect("create");
    std::io::Write::write_all(&mut file, head).expect("write");
    file.set_len(bytes).expect("set_len");
    path
}

#[test]
fn files_claiming_gigabytes_are_refused_before_reading() {
    let folder = tempfile::tempdir().expect("temporary folder");
    let limits = [
        (
            "huge.model.json",
            ballast::limits::MAX_MODEL_FILE_BYTES + 1,
            vec!["inspect".to_string()],
        ),
        (
            "huge.csv",
            ballast::limits::MAX_DATA_FILE_BYTES + 1,
            vec![
                "evaluate".to_string(),
                "--model".into(),
                corpus()
                    .join("good/plain3.model.json")
                    .display()
                    .to_string(),
                "--data".into(),
            ],
        ),
    ];
    for (name, bytes, mut args) in limits {
        let path = sparse_file(folder.path(), name, bytes, b"label,x0,x1,x2\n");
        args.push(path.display().to_string());
        let run = run_ballast(&args);
        let problem = check(&run, &path.display().to_string(), "above the limit of");
        assert!(problem.is_none(), "{name}: {}", problem.unwrap_or_default());
    }
}

#[test]
fn missing_files_and_folders_are_input_errors() {
    let folder = tempfile::tempdir().expect("temporary folder");
    let missing = folder
        .path()
        .join("no-such.model.json")
        .display()
        .to_string();
    let run = run_ballast(&["inspect".into(), missing.clone()]);
    assert!(
        check(&run, &missing, "No such file").is_none(),
        "{}",
        run.stderr
    );
    let dir = folder.path().display().to_string();
    let run = run_ballast(&["inspect".into(), dir.clone()]);
    assert!(check(&run, &dir, "directory").is_none(), "{}", run.stderr);
}

#[test]
fn allow_large_lifts_the_data_limit_without_overflow() {
    // `--allow-large` reads with no byte limit; the limit arithmetic must not overflow (a panic in
    // debug builds) and a good file must still load.
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let run = run_ballast(&[
        "evaluate".into(),
        "--model".into(),
        root.join("tests/data/digits_mlp.model.json")
            .display()
            .to_string(),
        "--data".into(),
        root.join("tests/data/digits_test.csv")
            .display()
            .to_string(),
        "--allow-large".into(),
    ]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    assert!(run.stdout.contains("samples: 540"), "{}", run.stdout);
}

#[test]
fn bad_flag_values_are_input_errors() {
    // Flags rather than files: each must be refused before any work, naming the flag, writing nothing.
    let good = corpus().join("good");
    let model = good.join("two_sensor.model.json").display().to_string();
    let data = good.join("two_sensor.csv").display().to_string();
    let cases: [(&[&str], &str); 14] = [
        (&["--eps=-0.1"], "--eps: -0.1 is not allowed"),
        (&["--eps", "nan"], "--eps: NaN is not allowed"),
        (&["--eps", "1e999"], "--eps: inf is not allowed"),
        (&["--eps", "0.1,x"], "--eps: \"x\" is not a number"),
        (
            &["--eps", "missing-tolerances.csv"],
            "--eps: the tolerance file",
        ),
        (
            &["--eps", "0.1", "--floor", "1.5"],
            "--floor: 1.5 is not allowed",
        ),
        (
            &["--eps", "0.1", "--floor=-0.1"],
            "--floor: -0.1 is not allowed",
        ),
        (
            &["--eps", "0.1", "--floor", "NaN"],
            "--floor: NaN is not allowed",
        ),
        (
            &["--eps", "0.1", "--confidence", "1"],
            "--confidence: 1 is not allowed",
        ),
        (
            &["--eps", "0.1", "--budget=-1"],
            "--budget: -1 is not allowed",
        ),
        (
            &["--eps", "0.1", "--budget", "inf"],
            "--budget: inf is not allowed",
        ),
        (&["--eps", "0.1", "--norm", "l3"], "--norm: unknown norm"),
        (
            &["--eps", "0.1", "--shard", "0/2"],
            "--shard: \"0/2\" is not allowed",
        ),
        (
            &["--eps", "0.1", "--forbid-into", "cat"],
            "--forbid-into: \"cat\" is not a class",
        ),
    ];
    let mut failures = Vec::new();
    for (flags, expected) in cases {
        let out = tempfile::tempdir().expect("temporary folder");
        let mut args: Vec<String> = ["certify", "--model", &model, "--data", &data]
            .map(String::from)
            .to_vec();
        args.extend(flags.iter().map(|f| f.to_string()));
        args.push("--report".into());
        args.push(out.path().join("r.json").display().to_string());
        let run = run_ballast(&args);
        let flag = expected.split(':').next().expect("a flag");
        if let Some(problem) = check(&run, flag, expected) {
            failures.push(format!("{flags:?}: {problem}"));
        }
        if !everything_under(out.path()).is_empty() {
            failures.push(format!("{flags:?}: wrote into the output folder"));
        }
    }
    assert!(failures.is_empty(), "{}", failures.join("\n"));
}

/// A small valid model whose every string is hostile: markup, quotes and path parts.
fn hostile_model() -> String {
    r#"{"format": "ballast.model/1", "name": "<script>alert('name')</script>../../escape",
        "input": {"dim": 2, "names": ["../../speed", "<img src=x onerror=alert(1)>"],
                  "lower": [0, -40], "upper": [10, 120]},
        "classes": ["</td><script>alert('class')</script>", "../../../worn&\"quoted\""],
        "layers": [{"kind": "dense", "weights": [[0.3, -0.1]], "bias": [0.2]}],
        "provenance": {"note": "<!-- ../../ -->"}}"#
        .to_owned()
}

#[test]
fn outputs_escape_input_strings_and_stay_in_their_folders() {
    // Strings from a model end up in the report and the sheet. The HTML sheet must escape them, and no
    // name from an input may steer a file outside the folders given on the command line (common
    // practice for anything that renders untrusted text or builds paths).
    let sandbox = tempfile::tempdir().expect("temporary folder");
    let work = sandbox.path().join("work");
    let inputs = work.join("inputs");
    let outputs = work.join("outputs");
    std::fs::create_dir_all(&inputs).expect("folder");
    std::fs::create_dir_all(&outputs).expect("folder");
    let model = inputs.join("model.json");
    std::fs::write(&model, hostile_model()).expect("write");
    let data = inputs.join("data.csv");
    std::fs::write(
        &data,
        "label,<img src=x onerror=alert(1)>,../../speed\n\
         </td><script>alert('class')</script>,20,1\n\
         1,100,9\n0,50,5\n",
    )
    .expect("write");
    let report = outputs.join("report.json");
    let sheet = outputs.join("sheet");
    let path = |p: &Path| p.display().to_string();
    let run = run_ballast(&[
        "certify".into(),
        "--model".into(),
        path(&model),
        "--data".into(),
        path(&data),
        "--eps".into(),
        "0.5".into(),
        "--report".into(),
        path(&report),
        "--sheet".into(),
        path(&sheet),
    ]);
    assert!(
        matches!(run.code, Some(0 | 1 | 3)),
        "certify failed: {}",
        run.stderr
    );
    let html = std::fs::read_to_string(sheet.join("sheet.html")).expect("the sheet was written");
    for raw in [
        "<script>alert",
        "<img src=x",
        "</td><script>",
        "<!-- ../../ -->",
    ] {
        assert!(
            !html.contains(raw),
            "sheet.html contains the raw input string {raw:?}"
        );
    }
    assert!(
        html.contains("&lt;script&gt;alert(") || html.contains("&#60;script&#62;alert("),
        "the model name is not shown escaped"
    );
    // Only the two folders hold anything new: nothing beside them in the sandbox or its parent.
    let outside: Vec<PathBuf> = everything_under(sandbox.path())
        .into_iter()
        .filter(|p| !p.starts_with(&inputs) && !p.starts_with(&outputs) && *p != work)
        .collect();
    assert!(
        outside.is_empty(),
        "files written outside the chosen folders: {outside:?}"
    );
    let in_outputs = everything_under(&outputs);
    assert!(in_outputs.contains(&report), "{in_outputs:?}");
    let rerender = sandbox.path().join("rerendered");
    let run = run_ballast(&[
        "sheet".into(),
        "--report".into(),
        path(&report),
        "--out".into(),
        path(&rerender),
    ]);
    assert_eq!(run.code, Some(0), "{}", run.stderr);
    let again = std::fs::read_to_string(rerender.join("sheet.html")).expect("re-rendered");
    assert!(
        !again.contains("<script>alert"),
        "re-rendered sheet.html is not escaped"
    );
    let names: Vec<String> = everything_under(&rerender)
        .iter()
        .map(|p| p.file_name().expect("named").to_string_lossy().into_owned())
        .collect();
    assert_eq!(
        names,
        ["sheet.html", "sheet.md"],
        "the sheet folder holds only the two sheet files"
    );
}
