//! A search split across threads (the root attack beside the trees, the probes beside the children's
//! bounds, chunks of sub-domains in parallel) reaches the same verdict as the same search on one
//! thread: on random small networks, and on the digits samples whose exact verdicts come from HiGHS
//! (`tests/reference/out/milp_digits_mlp.json`, written by `tests/reference/milp_reference.py` with
//! scipy 1.17.1's `scipy.optimize.milp`).

use ballast::attack::validate;
use ballast::model::{predicted_class, Network};
use ballast::search::{verify_batch, SearchOutcome, SearchProblem, SearchSettings, Verdict};
use ballast::threat::{Budget, Norm};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use serde_json::Value;

mod common;
use common::fixtures::{digits_mlp, random_network};

/// The outcomes of `problems` on a rayon pool of `threads` threads.
fn on_threads(
    network: &Network,
    problems: &[SearchProblem],
    settings: &SearchSettings,
    threads: usize,
) -> Vec<SearchOutcome> {
    let pool = rayon::ThreadPoolBuilder::new()
        .num_threads(threads)
        .build()
        .unwrap();
    pool.install(|| verify_batch(network, problems, settings))
        .into_iter()
        .map(|o| o.unwrap())
        .collect()
}

/// Same verdict, same counterexample, same proven bound; a counterexample is valid and inside the
/// region. Returns the verdicts' kinds as "proved" / "refuted".
fn assert_same(
    network: &Network,
    problem: &SearchProblem,
    one: &SearchOutcome,
    many: &SearchOutcome,
) -> &'static str {
    let context = format!(
        "sample {}: {:?} vs {:?}",
        problem.index, one.verdict, many.verdict
    );
    match (&one.verdict, &many.verdict) {
        (
            Verdict::Proved {
                min_margin_lower: a,
            },
            Verdict::Proved {
                min_margin_lower: b,
            },
        ) => {
            assert!((a - b).abs() <= 1e-12 * (1.0 + a.abs()), "{context}");
            // The trees ran to the end on both pools: the same tree.
            assert_eq!(one.nodes, many.nodes, "{context}");
            "proved"
        }
        (Verdict::Counterexample(a), Verdict::Counterexample(b)) => {
            assert_eq!(a.input, b.input, "{context}");
            for c in [a, b] {
                let again = validate(
                    network,
                    &problem.region,
                    problem.label,
                    &problem.targets,
                    &c.input,
                );
                assert!(again.is_some(), "{context}");
            }
            "refuted"
        }
        _ => panic!("verdicts differ or unresolved: {context}"),
    }
}

/// Random networks of depth 2–4 and budgets from small to large, with the root attack, without it
/// (the trees must find the counterexamples) and with plain branching: one thread and four threads
/// give the same verdicts, both kinds of verdict occur and some samples need trees.
#[test]
fn random_networks_same_verdict_on_one_and_many_threads() {
    let mut rng = ChaCha8Rng::seed_from_u64(17);
    let variants = [
        SearchSettings::default(),
        SearchSettings {
            root_attack: None,
            node_attack_steps: 0,
            batch_size: 4,
            ..SearchSettings::default()
        },
        SearchSettings {
            branching_candidates: 1,
            batch_size: 2,
            ..SearchSettings::default()
        },
    ];
    let mut kinds = std::collections::BTreeMap::new();
    for case in 0..8 {
        let sizes: &[usize] = match case % 3 {
            0 => &[4, 10, 3],
            1 => &[4, 8, 8, 3],
            _ => &[4, 6, 6, 6, 3],
        };
        let network = random_network(&mut rng, sizes);
        let problems: Vec<SearchProblem> = (0..6)
            .map(|index| {
                let center: Vec<f64> = (0..4).map(|_| rng.gen_range(0.2..0.8)).collect();
                let label = predicted_class(network.forward(&center).as_slice());
                let epsilon = [0.02, 0.08, 0.2][index % 3];
                SearchProblem {
                    index,
                    region: Budget::uniform(Norm::Linf, epsilon, 4)
                        .region(&center, &[0.0; 4], &[1.0; 4]),
                    label,
                    targets: (0..3).filter(|j| *j != label).collect(),
                }
            })
            .collect();
        for settings in &variants {
            let one = on_threads(&network, &problems, settings, 1);
            let many = on_threads(&network, &problems, settings, 4);
            for ((problem, a), b) in problems.iter().zip(&one).zip(&many) {
                *kinds
                    .entry(assert_same(&network, problem, a, b))
                    .or_insert(0) += 1;
                if a.nodes > 1 {
                    *kinds.entry("searched").or_insert(0) += 1;
                }
            }
        }
    }
    assert!(kinds.get("proved").copied().unwrap_or(0) > 0, "{kinds:?}");
    assert!(kinds.get("refuted").copied().unwrap_or(0) > 0, "{kinds:?}");
    // Some samples needed trees, not only the root bound or attack.
    assert!(kinds.get("searched").copied().unwrap_or(0) > 0, "{kinds:?}");
}

/// The digits samples of both HiGHS budgets: one thread and four threads give the same verdict, and
/// it is HiGHS's (robust iff every exact minimum margin is > 0).
#[test]
fn digits_same_verdict_on_one_and_many_threads_and_equal_to_highs() {
    let (model, data) = digits_mlp();
    let network = model.classifier();
    let text = std::fs::read_to_string("tests/reference/out/milp_digits_mlp.json").unwrap();
    let reference: Value = serde_json::from_str(&text).unwrap();
    for budget in reference["budgets"].as_array().unwrap() {
        let epsilon = budget["epsilon"].as_f64().unwrap();
        let mut problems = Vec::new();
        let mut robust = Vec::new();
        for s in budget["samples"].as_array().unwrap() {
            let index = s["index"].as_u64().unwrap() as usize;
            let targets = s["targets"].as_array().unwrap();
            robust.push(targets.iter().all(|t| t["exact"].as_f64().unwrap() > 0.0));
            problems.push(SearchProblem {
                index,
                region: Budget::uniform(Norm::Linf, epsilon, model.input.dim).region(
                    data.sample(index),
                    &model.input.lower,
                    &model.input.upper,
                ),
                label: s["label"].as_u64().unwrap() as usize,
                targets: targets
                    .iter()
                    .map(|t| t["target"].as_u64().unwrap() as usize)
                    .collect(),
            });
        }
        let settings = SearchSettings::default();
        let one = on_threads(&network, &problems, &settings, 1);
        let many = on_threads(&network, &problems, &settings, 4);
        for (((problem, a), b), robust) in problems.iter().zip(&one).zip(&many).zip(robust) {
            let kind = assert_same(&network, problem, a, b);
            assert_eq!(
                kind == "proved",
                robust,
                "eps {epsilon} sample {}: HiGHS says robust = {robust}",
                problem.index
            );
        }
    }
}
