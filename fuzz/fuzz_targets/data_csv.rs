//! Fuzz target: the CSV loader must return `Ok` or a `(place, message)` error for any text, never panic,
//! and every accepted data set must have one label per sample and labels in the model's class range.
#![no_main]

use std::sync::OnceLock;

use libfuzzer_sys::fuzz_target;

fn models() -> &'static [ballast::model::Model; 2] {
    static MODELS: OnceLock<[ballast::model::Model; 2]> = OnceLock::new();
    MODELS.get_or_init(|| {
        let named = r#"{"format":"ballast.model/1","input":{"dim":2,"names":["a","b"],"lower":0,"upper":[1,5]},
            "classes":["no","yes"],"layers":[{"kind":"dense","weights":[[1,-1]],"bias":[0]}]}"#;
        let plain = r#"{"format":"ballast.model/1","input":{"dim":3},
            "layers":[{"kind":"dense","weights":[[1,0,0],[0,1,0],[0,0,1]],"bias":[0,0,0]}]}"#;
        [
            ballast::model::Model::from_json_str(named).expect("valid model"),
            ballast::model::Model::from_json_str(plain).expect("valid model"),
        ]
    })
}

fuzz_target!(|bytes: &[u8]| {
    let Some((&selector, rest)) = bytes.split_first() else {
        return;
    };
    let Ok(text) = std::str::from_utf8(rest) else {
        return;
    };
    let model = &models()[usize::from(selector & 1)];
    let options = ballast::data::DataOptions {
        out_of_range: if selector & 2 != 0 {
            ballast::data::OutOfRange::Clip
        } else {
            ballast::data::OutOfRange::Error
        },
        ..ballast::data::DataOptions::default()
    };
    if let Ok(data) = ballast::data::parse_csv(text, model, &options) {
        assert_eq!(data.features.ncols(), data.len());
        assert_eq!(data.features.nrows(), model.input.dim);
        assert!(data.labels.iter().all(|&l| l < model.class_count()));
        assert!(data.features.iter().all(|v| v.is_finite()));
    }
});
