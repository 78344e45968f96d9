//! Checks of the release sheet: hostile names are escaped (HTML and Markdown), the verdict comes first,
//! sweeps get a plot, the sheet is self-contained, and `ballast sheet` re-renders a saved report
//! byte for byte.

use std::path::Path;
use std::process::Command;

use ballast::certify::report::Report;
use ballast::certify::{certify, CertifyOptions, PipelineOptions, Sources};
use ballast::data::{parse_csv, DataOptions};
use ballast::model::Model;
use ballast::sheet::{content, html, markdown};
use ballast::threat::requirement::Requirement;
use ballast::threat::{Norm, Targets};

const HOSTILE_CLASS: &str = "<script>alert(\"x\")</script> & 'co'";

fn hostile_model() -> Model {
    let json = r#"{"format":"ballast.model/1","name":"pump <b>\"v2\"</b> & sons",
      "input":{"dim":2,"names":["flow <img src=x onerror=1>","temp | *hot* [x](http://e)"],"lower":0,"upper":1},
      "classes":["normal & fine","<script>alert(\"x\")</script> & 'co'"],
      "layers":[{"kind":"dense","weights":[[4,-4],[-4,4]],"bias":[0,0]}]}"#;
    Model::from_json_str(json).expect("valid model")
}

fn hostile_report(epsilons: Vec<f64>) -> Report {
    let model = hostile_model();
    let csv = "label,\"flow <img src=x onerror=1>\",\"temp | *hot* [x](http://e)\"\n\
               0,0.9,0.1\n0,0.6,0.5\n1,0.2,0.8\n1,0.45,0.5\n0,0.7,0.2\n";
    let data = parse_csv(csv, &model, &DataOptions::default()).expect("valid data");
    let requirement = Requirement {
        epsilons,
        floor: Some(0.5),
        targets: Targets::Into {
            classes: vec![1],
            from: None,
        },
        ..Requirement::uniform(Norm::Linf, 0.1)
    };
    let options = CertifyOptions {
        pipeline: PipelineOptions::default(),
        command_line: vec![
            "ballast".into(),
            "certify".into(),
            "--model".into(),
            "it's <here>.json".into(),
        ],
        ..CertifyOptions::default()
    };
    certify(
        &model,
        &data,
        &requirement,
        &Sources::in_memory(&model, &data),
        &options,
    )
    .expect("certify runs")
}

#[test]
fn hostile_names_are_escaped_in_html_and_markdown() {
    let report = hostile_report(vec![0.05, 0.1, 0.2]);
    assert!(report.model.classes.iter().any(|c| c == HOSTILE_CLASS));
    let c = content::build(&report);
    let page = html::render(&c);
    assert!(!page.contains("<script"), "raw script tag in the HTML");
    assert!(!page.contains("<img"), "raw img tag in the HTML");
    assert!(!page.contains("<b>"));
    assert!(page.contains("&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &#39;co&#39;"));
    assert!(page.contains("pump &lt;b&gt;&quot;v2&quot;&lt;/b&gt; &amp; sons"));
    assert!(page.contains("&lt;here&gt;.json") && !page.contains("<here>"));
    // Self-contained: no scripts, links, external sources or event handlers in any tag (the escaped
    // names may show such words as text).
    for forbidden in ["<script", "<link", "<img", "@import", "url("] {
        assert!(!page.contains(forbidden), "found {forbidden}");
    }
    for tag in page
        .split('<')
        .skip(1)
        .map(|t| t.split('>').next().unwrap())
    {
        for attribute in [" src=", " href=", "onerror="] {
            assert!(!tag.contains(attribute), "found {attribute} in <{tag}>");
        }
    }
    let md = markdown::render(&c);
    assert!(!md.contains("<script"), "raw script tag in the Markdown");
    assert!(md.contains("&lt;script&gt;"));
    assert!(md.contains("pump &lt;b&gt;&quot;v2&quot;&lt;/b&gt; &amp; sons"));
    // Table cells cannot be split by a pipe from a name.
    for line in md.lines().filter(|l| l.starts_with("| ")) {
        let header_cells = line.matches(" | ").count();
        assert!(header_cells <= 6, "unexpected cells in {line}");
    }
}

#[test]
fn verdict_comes_first_and_sweeps_are_plotted() {
    let report = hostile_report(vec![0.05, 0.1, 0.2]);
    let c = content::build(&report);
    let page = html::render(&c);
    let verdict = page.find("class=\"verdict").expect("a verdict block");
    let requirement = page.find("<h2>Requirement</h2>").unwrap();
    assert!(verdict < requirement);
    assert!(page.contains("<svg"));
    assert_eq!(
        page.matches("<polyline").count(),
        2,
        "certified and empirical lines"
    );
    assert!(page.contains("no safety case"));
    assert!(page.contains("only this model file"));
    assert!(page.contains(&report.model.sha256));
    assert!(page.contains(&report.data.sha256));
    assert!(page.contains("LOWER bound") && page.contains("UPPER bound"));
    let md = markdown::render(&c);
    let first_heading = md.lines().find(|l| l.starts_with("## ")).unwrap();
    assert!(first_heading.starts_with("## Verdict"));
    // An interrupted run's sheet says so.
    let mut partial = report.clone();
    partial.complete = false;
    let page = html::render(&content::build(&partial));
    assert!(page.contains("INCOMPLETE"));
    // The sweep's floor epsilons: the proven end is a swept epsilon where the floor passed, the
    // not-refuted end one where it did not fail, and the proven end is never the larger.
    let ends = report.floor_epsilons.expect("a sweep with a floor");
    let verdict_at = |e: f64| {
        report
            .sweep
            .iter()
            .find(|p| p.epsilon == e)
            .map(|p| p.summary.verdict)
    };
    if let Some(e) = ends.certified {
        assert_eq!(verdict_at(e), Some(ballast::certify::Verdict::Pass));
        assert!(ends.empirical >= Some(e));
    }
    if let Some(e) = ends.empirical {
        assert_ne!(verdict_at(e), Some(ballast::certify::Verdict::Fail));
    }
    assert!(c
        .figures
        .iter()
        .any(|f| f.name == "Largest epsilon meeting the floor"));
    // One epsilon: no plot.
    let single = hostile_report(vec![0.1]);
    let page = html::render(&content::build(&single));
    assert!(!page.contains("<polyline"));
}

#[test]
fn sheet_command_rerenders_the_same_files() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let first = dir.path().join("first");
    let again = dir.path().join("again");
    let bin = env!("CARGO_BIN_EXE_ballast");
    let status = Command::new(bin)
        .args([
            "certify",
            "--model",
            "tests/data/digits_mlp.model.json",
            "--data",
            "tests/data/digits_test.csv",
            "--eps",
            "0.01,0.03",
            "--report",
            report.to_str().unwrap(),
            "--sheet",
            first.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(
        status.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&status.stderr)
    );
    let out = Command::new(bin)
        .args([
            "sheet",
            "--report",
            report.to_str().unwrap(),
            "--out",
            again.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(0));
    for name in ["sheet.md", "sheet.html"] {
        let a = std::fs::read(first.join(name)).unwrap();
        let b = std::fs::read(again.join(name)).unwrap();
        assert_eq!(a, b, "{name} differs");
    }
    // A file that is not a report is refused with its name.
    let bogus = dir.path().join("bogus.json");
    std::fs::write(&bogus, "{\"format\": \"something/1\"}").unwrap();
    let out = Command::new(bin)
        .args([
            "sheet",
            "--report",
            bogus.to_str().unwrap(),
            "--out",
            again.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(out.status.code(), Some(2));
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("bogus.json") && err.contains("ballast.report/1"),
        "{err}"
    );
    assert!(Path::new(&again.join("sheet.html")).exists());
}

/// The sheet lists every feature's radius, in the input's units, against the tolerance file it judged:
/// radius = epsilon × tolerance (the tolerance file's definition in docs/requirement-format.md; doubling
/// is exact in binary floating point, so the expected text is the shortest form of 2 × tolerance), with
/// the unit and valid range the model file states (read here with serde_json, not through ballast), and
/// the rest of the requirement: norm, class-change rule and arithmetic.
#[test]
fn sheet_lists_each_feature_radius_from_the_tolerance_file() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let dir = tempfile::tempdir().unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .current_dir(root)
        .args([
            "certify",
            "--model",
            "models/pump-mlp.json",
            "--data",
            "demo-data/acceptance.csv",
        ])
        .args([
            "--tolerances",
            "demo-data/tolerances.json",
            "--eps",
            "2",
            "--forbid-into",
            "normal",
            "--no-attack",
            "--sheet",
        ])
        .arg(dir.path())
        .output()
        .expect("the binary runs");
    assert!(
        matches!(out.status.code(), Some(0 | 1 | 3)),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let html = std::fs::read_to_string(dir.path().join("sheet.html")).unwrap();
    let tolerances: serde_json::Map<String, serde_json::Value> = serde_json::from_str(
        &std::fs::read_to_string(root.join("demo-data/tolerances.json")).unwrap(),
    )
    .unwrap();
    assert_eq!(tolerances.len(), 12);
    assert!(
        html.contains("radius at epsilon 2"),
        "no budget table header"
    );
    let model: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(root.join("models/pump-mlp.json")).unwrap())
            .unwrap();
    let input = &model["input"];
    let names = input["names"].as_array().unwrap();
    for (name, value) in &tolerances {
        let i = names.iter().position(|n| n == name.as_str()).unwrap();
        let t = value.as_f64().unwrap();
        // Unit "1" marks a quantity of dimension one (SI convention, common practice); the sheet
        // spells it out.
        let unit = match input["units"][i].as_str().unwrap() {
            "1" => "dimensionless",
            u => u,
        };
        let (lower, upper) = (
            input["lower"][i].as_f64().unwrap(),
            input["upper"][i].as_f64().unwrap(),
        );
        let row = format!(
            "<td>{name}</td><td>{unit}</td><td class=\"num\">{t}</td><td class=\"num\">{}</td><td class=\"num\">{lower}</td><td class=\"num\">{upper}</td>",
            2.0 * t
        );
        assert!(html.contains(&row), "missing row {row}");
    }
    assert!(html.contains("<dt>Norm</dt><dd>L-inf"), "no norm");
    assert!(
        html.contains("<dt>Class changes that count</dt><dd>only a change into normal counts"),
        "no class-change rule"
    );
    assert!(
        html.contains("<dt>Arithmetic covered</dt><dd>float64"),
        "no arithmetic"
    );
}

/// An interrupted run's sheet: the figures are over the finished samples (counted here from the
/// statuses by hand), it says how many of how many finished, and it offers --resume, not --budget.
#[test]
fn interrupted_sheet_counts_finished_samples_only() {
    let mut report = hostile_report(vec![0.1]);
    assert_eq!(report.samples.len(), 5);
    report.samples.truncate(2);
    report.complete = false;
    report.recompute();
    let finished = &report.samples;
    let certified = finished
        .iter()
        .filter(|s| s.status == ballast::certify::Status::Certified)
        .count();
    let expected_certified = format!("{:.2}%", certified as f64 / 2.0 * 100.0);
    let c = content::build(&report);
    let text = markdown::render(&c);
    assert!(text.contains("2 of 5 finished"), "{text}");
    assert!(text.contains("interrupted after 2 of 5 samples"), "{text}");
    assert!(text.contains("over the 2 finished samples only"), "{text}");
    let figure = c
        .figures
        .iter()
        .find(|f| f.name == "Certified accuracy")
        .unwrap();
    assert_eq!(figure.value, expected_certified);
    let not_run = c.figures.iter().find(|f| f.name == "Not run").unwrap();
    assert_eq!(not_run.value, "3");
    assert_eq!(report.summary.verdict, ballast::certify::Verdict::Undecided);
    assert!(
        c.reason.contains("3 of 5 samples were not run"),
        "{}",
        c.reason
    );
    assert!(c.reason.contains("--resume"), "{}", c.reason);
    assert!(certified > 0, "the check needs a certified finished sample");
    assert!(!text.contains("More search time (--budget)"), "{text}");
}

/// The tick labels of every axis in `svg`: the text of `<text>` elements that sit at the tick rows
/// (x ticks) or beside the plot (y ticks, right-aligned), parsed as numbers; `%` is dropped.
fn tick_labels(svg: &str) -> (Vec<f64>, Vec<f64>) {
    let text = |line: &str| -> Option<String> {
        let start = line.find("<text")?;
        let body = &line[start..];
        let open = body.find('>')? + 1;
        let close = body.find("</text>")?;
        Some(body[open..close].trim_end_matches('%').to_string())
    };
    let mut x = Vec::new();
    let mut y = Vec::new();
    for line in svg.lines() {
        let Some(t) = text(line) else { continue };
        let Ok(v) = t.parse::<f64>() else { continue };
        if line.contains("stroke=\"#ddd\"") {
            y.push(v);
        } else if line.contains("stroke=\"#999\"/><text") {
            x.push(v);
        }
    }
    (x, y)
}

/// Steps between ticks are 1, 2 or 5 times a power of ten ("nice numbers": Heckbert, "Nice numbers
/// for graph labels", Graphics Gems, 1990), and every tick label is written with at most 3 decimals.
fn assert_nice(ticks: &[f64], what: &str) {
    assert!(ticks.len() >= 2, "{what}: {ticks:?}");
    let step = ticks[1] - ticks[0];
    let mantissa = step / 10f64.powf(step.log10().floor());
    assert!(
        [1.0, 2.0, 5.0, 10.0]
            .iter()
            .any(|n| (mantissa - n).abs() < 1e-6),
        "{what}: step {step} in {ticks:?}"
    );
    for w in ticks.windows(2) {
        assert!(((w[1] - w[0]) - step).abs() < 1e-9, "{what}: {ticks:?}");
    }
}

#[test]
fn plots_have_nice_ticks_axis_names_and_no_label_past_the_edge() {
    let mut report = hostile_report(vec![0.05, 0.1, 0.2]);
    // Radii with awkward values: the histogram's bins and ticks must still be round.
    for (k, s) in report.samples.iter_mut().enumerate() {
        s.radius = Some(0.0170121 * (k + 1) as f64);
    }
    let page = html::render(&content::build(&report));
    let all: Vec<&str> = page.split("<svg").skip(1).collect();
    // The bar chart of the counterexamples' movement: nice ticks along its x axis (drawn as grid lines),
    // an axis name, and every row label right-aligned inside the picture's left margin.
    let bars: Vec<&&str> = all
        .iter()
        .filter(|s| s.contains("mean signed change of each feature"))
        .collect();
    assert_eq!(bars.len(), 1, "the counterexample movement chart");
    let (_, grid) = tick_labels(bars[0]);
    assert_nice(&grid, "bar chart ticks");
    assert!(
        bars[0].contains(">mean δ / radius over the counterexamples"),
        "no x-axis name"
    );
    let labels: Vec<&str> = bars[0]
        .lines()
        .filter(|l| l.contains("text-anchor=\"end\">temp"))
        .collect();
    assert_eq!(labels.len(), 1, "the row label of the long feature name");
    for line in labels {
        let at: f64 = line
            .split("<text x=\"")
            .nth(1)
            .and_then(|r| r.split('"').next())
            .unwrap()
            .parse()
            .unwrap();
        let chars = "temp | *hot* [x](http://e)".chars().count() as f64;
        assert!(
            at - chars * 6.4 >= 0.0,
            "row label runs past the left edge: {line}"
        );
    }
    let svgs: Vec<&&str> = all.iter().filter(|s| s.contains("rotate(-90")).collect();
    assert_eq!(svgs.len(), 2, "sweep plot and histogram");
    for (svg, y_name) in svgs.iter().zip(["robust accuracy", "samples"]) {
        let (x, y) = tick_labels(svg);
        assert_nice(&x, "x ticks");
        assert_nice(&y, "y ticks");
        assert!(svg.contains("rotate(-90 16 "), "no y-axis name");
        assert!(
            svg.contains(&format!(">{y_name}</text>")),
            "y-axis name {y_name}"
        );
        // A label centred at the right edge would be cut off: the last x tick is anchored inside.
        for line in svg.lines().filter(|l| l.contains("text-anchor=\"middle\"")) {
            let at: f64 = line
                .split("<text x=\"")
                .nth(1)
                .and_then(|r| r.split('"').next())
                .and_then(|v| v.parse().ok())
                .unwrap_or(320.0);
            assert!(at < 640.0 - 20.0 || !line.contains("</text>"), "{line}");
        }
    }
}

/// Runs the binary in the project root; panics unless it exits with one of `codes`.
fn run_ok(args: &[&str], codes: &[i32]) {
    let out = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(args)
        .output()
        .expect("the binary runs");
    let code = out.status.code().unwrap_or(-1);
    assert!(
        codes.contains(&code),
        "{args:?}: exit {code}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// A model retrained by `ballast retrain` carries its lineage into every sheet certified on it: the
/// parent's path and SHA-256 (the digest recorded by retrain, checked against the parent file with the
/// sha2 crate), the rounds, and which data decided what. Certified on data that steered the retraining
/// (the training file, which also held the validation rows whose check decides whether another round
/// runs), the sheet cautions that the figures are optimistically biased; on a separate acceptance file
/// it does not, however many rounds were allowed (it is certified once, after the last round).
#[test]
fn retrained_model_sheet_names_its_parent_and_the_data_that_steered_it() {
    use sha2::Digest;
    let dir = tempfile::tempdir().unwrap();
    let parent = "models/pump-mlp.json";
    let parent_sha = format!(
        "{:x}",
        sha2::Sha256::digest(
            std::fs::read(Path::new(env!("CARGO_MANIFEST_DIR")).join(parent)).unwrap()
        )
    );
    let caution = "optimistically biased";
    for rounds in ["1", "2"] {
        let model = dir.path().join(format!("retrained-{rounds}.json"));
        let model = model.to_str().unwrap();
        run_ok(
            &[
                "retrain",
                "--model",
                parent,
                "--train",
                "demo-data/train.csv",
                "--acceptance",
                "demo-data/acceptance.csv",
                "--requirement",
                "demo-data/requirement.toml",
                "--epochs",
                "1",
                "--round-epochs",
                "1",
                "--max-rounds",
                rounds,
                "--out",
                model,
            ],
            &[0, 1],
        );
        for (data, biased) in [
            ("demo-data/acceptance.csv", false),
            ("demo-data/train.csv", true),
        ] {
            let sheet = dir.path().join(format!("sheet-{rounds}-{}", data.len()));
            run_ok(
                &[
                    "certify",
                    "--model",
                    model,
                    "--data",
                    data,
                    "--requirement",
                    "demo-data/requirement.toml",
                    "--no-attack",
                    "--sheet",
                    sheet.to_str().unwrap(),
                ],
                &[0, 1, 3],
            );
            let md = std::fs::read_to_string(sheet.join("sheet.md")).unwrap();
            assert!(md.contains("## Model lineage"), "{md}");
            assert!(md.contains(&format!("(SHA-256 {parent_sha})")), "{md}");
            assert!(
                md.contains(&format!("in 1 of at most {rounds} rounds")) || rounds == "2",
                "{md}"
            );
            let acceptance_row = md
                .lines()
                .find(|l| l.starts_with("| acceptance | demo-data/acceptance.csv |"))
                .expect("the acceptance row");
            assert!(acceptance_row.ends_with("| no |"), "{acceptance_row}");
            assert_eq!(
                md.contains(caution),
                biased,
                "{data}, {rounds} rounds: {md}"
            );
        }
    }
}

/// A real interrupt: certify runs on the hard digits instance (the deep model at eps 0.06, where many
/// samples need the search), SIGINT arrives once the journal holds finished samples, and the run
/// stops after the samples in progress. The exit code is 128 + 2 (SIGINT, design.md), the report is
/// marked incomplete, and the sheet's counts are those of the journal's finished samples: "N of 540
/// finished", a per-class table adding up to N, "Not run" = 540 − N, and --resume offered.
#[test]
fn interrupted_run_sheet_counts_the_journal_after_a_real_sigint() {
    let dir = tempfile::tempdir().unwrap();
    let report = dir.path().join("r.json");
    let journal = dir.path().join("r.journal.jsonl");
    let sheet = dir.path().join("sheet");
    let mut child = Command::new(env!("CARGO_BIN_EXE_ballast"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args([
            "certify",
            "--model",
            "tests/data/digits_mlp_deep.model.json",
            "--data",
            "tests/data/digits_test.csv",
            "--eps",
            "0.06",
            "--budget",
            "2",
            "--report",
        ])
        .arg(&report)
        .arg("--sheet")
        .arg(&sheet)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("the binary starts");
    // Wait for finished samples in the journal (its first line is the header).
    loop {
        let lines = std::fs::read_to_string(&journal)
            .map(|t| t.lines().count())
            .unwrap_or(0);
        if lines >= 3 {
            break;
        }
        if let Some(status) = child.try_wait().unwrap() {
            panic!("certify ended before the interrupt: {status}");
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    let sent = Command::new("kill")
        .args(["-INT", &child.id().to_string()])
        .status()
        .expect("kill runs");
    assert!(sent.success());
    let status = child.wait().unwrap();
    assert_eq!(status.code(), Some(130), "128 + SIGINT");
    let finished = std::fs::read_to_string(&journal).unwrap().lines().count() - 1;
    let r = Report::from_json_str(&std::fs::read_to_string(&report).unwrap()).unwrap();
    assert!(!r.complete);
    assert_eq!(r.samples.len(), finished);
    assert!(finished < 540, "every sample finished before the interrupt");
    let md = std::fs::read_to_string(sheet.join("sheet.md")).unwrap();
    assert!(
        md.contains(&format!("| Samples | {finished} of 540 finished |")),
        "{md}"
    );
    assert!(
        md.contains(&format!("| Not run | {} |", 540 - finished)),
        "{md}"
    );
    assert!(md.contains("--resume"), "{md}");
    // The per-class table's sample column adds up to the finished samples.
    let per_class = md
        .split("## Per class")
        .nth(1)
        .unwrap()
        .split("\n## ")
        .next()
        .unwrap();
    let total: usize = per_class
        .lines()
        .filter(|l| l.starts_with("| ") && !l.starts_with("| class") && !l.starts_with("| ---"))
        .map(|l| {
            l.split(" | ")
                .nth(1)
                .unwrap()
                .trim()
                .parse::<usize>()
                .unwrap()
        })
        .sum();
    assert_eq!(total, finished, "{per_class}");
}
