//! Fuzz target: a requirement file (TOML or JSON, picked by the first byte) read with
//! `RequirementSpec::from_file` and resolved against a small model must give `Ok` or a typed error, never
//! panic; an accepted requirement has finite, non-negative, sorted epsilons and fractions in [0, 1].
#![no_main]

use std::path::PathBuf;
use std::sync::OnceLock;

use ballast::model::Model;
use ballast::threat::requirement::RequirementSpec;
use libfuzzer_sys::fuzz_target;

fn setup() -> &'static (Model, PathBuf) {
    static SETUP: OnceLock<(Model, PathBuf)> = OnceLock::new();
    SETUP.get_or_init(|| {
        let model = r#"{"format":"ballast.model/1","input":{"dim":2,"names":["speed","temp"],"lower":0,"upper":[10,120]},
            "classes":["normal","worn","broken"],"layers":[{"kind":"dense","weights":[[1,-1],[0,1],[1,1]],"bias":[0,0,0]}]}"#;
        let folder = std::env::temp_dir().join(format!("ballast-fuzz-requirement-{}", std::process::id()));
        std::fs::create_dir_all(&folder).expect("temporary folder");
        (Model::from_json_str(model).expect("valid model"), folder)
    })
}

fuzz_target!(|bytes: &[u8]| {
    let Some((&selector, rest)) = bytes.split_first() else {
        return;
    };
    let (model, folder) = setup();
    let name = if selector & 1 == 0 {
        "requirement.toml"
    } else {
        "requirement.json"
    };
    let path = folder.join(name);
    std::fs::write(&path, rest).expect("write the input");
    let Ok(spec) = RequirementSpec::from_file(&path) else {
        return;
    };
    if let Ok(requirement) = spec.resolve(model) {
        assert!(!requirement.epsilons.is_empty());
        assert!(requirement
            .epsilons
            .iter()
            .all(|e| e.is_finite() && *e >= 0.0));
        assert!(requirement.epsilons.windows(2).all(|w| w[0] <= w[1]));
        for fraction in [
            requirement.floor,
            requirement.min_clean_accuracy,
            requirement.confidence,
        ]
        .into_iter()
        .flatten()
        {
            assert!((0.0..=1.0).contains(&fraction));
        }
        let budget = requirement.budget(requirement.epsilon(), model.input.dim);
        assert!(budget.radii.iter().all(|r| r.is_finite() && *r >= 0.0));
    }
});
