#!/usr/bin/env python3
"""Writes the bad-input corpus (tests/bad-input/{model,data,good}/) and its manifest.

Run from the project root: python3 tests/bad-input/make_corpus.py
Standard library only. Every case is one row of CASES: the file, its bytes, the command that reads it and
the text its one-line error message must contain (the place: field, layer, row or column). The command
uses placeholders that tests/bad_input.rs fills in: {bad} the case's file, {digits} the good digits
model, {digits_data} the good digits CSV, {plain} / {named} the small good models under good/, {out} a
fresh temporary folder.
"""

import json
import os

ROOT = os.path.dirname(os.path.abspath(__file__))


def model(layers, dim=3, **extra):
    doc = {"format": "ballast.model/1", "input": {"dim": dim, "lower": 0.0, "upper": 1.0}, "layers": layers}
    doc.update(extra)
    return doc


def dense(rows, cols, value=0.5):
    return {"kind": "dense", "weights": [[value] * cols for _ in range(rows)], "bias": [0.0] * rows}


def js(doc):
    return json.dumps(doc).encode()


GOOD_PLAIN = model([dense(4, 3), {"kind": "relu"}, dense(2, 4)])
GOOD_NAMED = {
    "format": "ballast.model/1",
    "name": "two-sensor",
    "input": {"dim": 2, "names": ["speed", "temp"], "lower": [0.0, -40.0], "upper": [10.0, 120.0]},
    "classes": ["normal", "worn"],
    "layers": [{"kind": "dense", "weights": [[0.3, -0.1]], "bias": [0.2]}],
}

GOOD_MODEL_TEXT = json.dumps(GOOD_PLAIN, indent=1)
# A model whose first layer is 1 x 3 followed by a 3 x 1 layer would multiply out small; the reverse
# order (wide -> 1 -> wide, no ReLU between) multiplies out to a wide x wide map.
WIDE = 10_000


def nested_arrays(depth):
    return ("[" * depth + "]" * depth).encode()


def nested_objects(depth):
    return ('{"a":' * depth + "1" + "}" * depth).encode()


def provenance_model(provenance_bytes):
    head = js(model([dense(2, 3)]))[:-1]
    return head + b', "provenance": ' + provenance_bytes + b"}"


def with_number(token):
    # one weight replaced by a raw JSON token
    return ('{"format": "ballast.model/1", "input": {"dim": 2}, "layers": '
            '[{"kind": "dense", "weights": [[0.1, ' + token + ']], "bias": [0.0]}]}').encode()


HEADER3 = "label,x0,x1,x2\n"
NAMED_HEADER = "label,speed,temp\n"
DIGITS_HEADER = "label," + ",".join(f"px{i}" for i in range(64)) + "\n"


def digits_row(label="3", value="0.5", override=None):
    fields = [value] * 64
    if override:
        for k, v in override.items():
            fields[k] = v
    return label + "," + ",".join(fields) + "\n"


GOOD_PLAIN_CSV = HEADER3 + "0,0.1,0.2,0.3\n1,0.9,0.8,0.7\n0,0.5,0.5,0.5\n1,0.2,0.9,0.1\n"
GOOD_NAMED_CSV = NAMED_HEADER + "normal,1,20\nworn,9,100\n1,5,50\nnormal,2,10\n"

INSPECT = "inspect {bad}"
EVAL_PLAIN = "evaluate --model {plain} --data {bad}"
EVAL_NAMED = "evaluate --model {named} --data {bad}"
EVAL_DIGITS = "evaluate --model {digits} --data {bad}"
REQUIREMENT = "certify --model {named} --data {named_data} --requirement {bad} --report {out}/r.json"
TOLERANCES = "certify --model {named} --data {named_data} --tolerances {bad} --report {out}/r.json --sheet {out}/sheet"
SHEET = "sheet --report {bad} --out {out}"


def good_report():
    """The report of a real run (good/report.json, made by
    `ballast certify --model good/two_sensor.model.json --data good/two_sensor.csv --eps 0.1 --report ...`)."""
    with open(os.path.join(ROOT, "good", "report.json")) as f:
        return json.load(f)


def report_with(change):
    doc = good_report()
    change(doc)
    return js(doc)


def set_path(doc, keys, value):
    for k in keys[:-1]:
        doc = doc[k]
    doc[keys[-1]] = value


def report_set(keys, value):
    return report_with(lambda d: set_path(d, keys, value))


def report_without(key):
    return report_with(lambda d: d.pop(key))

CASES = [
    # ---- model files -------------------------------------------------------------------------------
    ("model/empty.json", b"", INSPECT, "empty file"),
    ("model/whitespace_only.json", b" \n\t\r\n", INSPECT, "empty file"),
    ("model/truncated.json", GOOD_MODEL_TEXT.encode()[: len(GOOD_MODEL_TEXT) // 2], INSPECT,
     "JSON syntax error at line"),
    ("model/not_an_object.json", b"[1, 2, 3]", INSPECT, "top level: expected a JSON object, found an array"),
    ("model/just_a_number.json", b"42", INSPECT, "top level: expected a JSON object, found a number"),
    ("model/trailing_garbage.json", js(GOOD_PLAIN) + b" trailing", INSPECT, "trailing characters"),
    ("model/wrong_format.json", js({**GOOD_PLAIN, "format": "ballast.model/2"}), INSPECT, "format: is \"ballast.model/2\""),
    ("model/missing_format.json", js({k: v for k, v in GOOD_PLAIN.items() if k != "format"}), INSPECT,
     "missing field `format`"),
    ("model/unknown_top_key.json", js({**GOOD_PLAIN, "layerz": []}), INSPECT, "unknown field `layerz`"),
    ("model/unknown_layer_key.json",
     js(model([{**dense(2, 3), "activation": "relu"}])), INSPECT, "layers[0]: unknown field `activation`"),
    ("model/unknown_layer_kind.json", js(model([dense(2, 3), {"kind": "conv2d"}])), INSPECT, "layers[1]"),
    ("model/layer_without_kind.json", js(model([{"weights": [[1, 2, 3]], "bias": [0]}])), INSPECT,
     "layers[0]"),
    ("model/layer_not_object.json", js(model([dense(2, 3), 7])), INSPECT, "layers[1]"),
    ("model/layers_not_array.json", js(model({"kind": "relu"})), INSPECT, "top level: invalid type"),
    ("model/layers_empty.json", js(model([])), INSPECT, "layers: is empty"),
    ("model/relu_only.json", js(model([{"kind": "relu"}])), INSPECT, "layers: has no dense or conv layer"),
    ("model/dim_as_string.json", js(model([dense(2, 3)], dim="3")), INSPECT, "invalid type: string \"3\""),
    ("model/dim_negative.json", js(model([dense(2, 3)], dim=-3)), INSPECT, "invalid value: integer `-3`"),
    ("model/dim_fraction.json", js(model([dense(2, 3)], dim=2.5)), INSPECT, "invalid type: floating point"),
    ("model/dim_zero.json", js(model([dense(2, 3)], dim=0)), INSPECT, "input.dim: must be at least 1"),
    ("model/dim_overflow.json", js(model([dense(2, 3)]))
     .replace(b'"dim": 3', b'"dim": 184467440737095516150'), INSPECT, "top level"),
    # 10^8 features claimed in a file of a few hundred bytes: nothing may be allocated from the claim.
    ("model/dim_1e8_claim_relu_only.json", js(model([{"kind": "relu"}], dim=100_000_000)), INSPECT,
     "layers: has no dense or conv layer"),
    ("model/dim_1e8_claim_with_dense.json", js(model([dense(2, 3)], dim=100_000_000)), INSPECT,
     "layers[0].weights: row 0 has 3 values, expected 100000000"),
    ("model/dim_max_claim_normalize.json",
     js(model([{"kind": "normalize", "mean": [0.0], "std": [1.0]}, dense(1, 1)], dim=2**64 - 1)), INSPECT,
     "layers[0].mean: has 1 values, expected 18446744073709551615"),
    ("model/weight_nan_string.json", with_number('"NaN"'), INSPECT, "invalid type: string \"NaN\""),
    ("model/weight_nan_token.json", with_number("NaN"), INSPECT, "JSON syntax error at line 1"),
    ("model/weight_infinity_token.json", with_number("-Infinity"), INSPECT, "JSON syntax error at line 1"),
    ("model/weight_1e999.json", with_number("1e999"), INSPECT, "number out of range"),
    ("model/weight_huge_negative_exponent_ok_but_bias_1e400.json",
     b'{"format": "ballast.model/1", "input": {"dim": 1}, "layers": '
     b'[{"kind": "dense", "weights": [[1e-400]], "bias": [-1e400]}]}', INSPECT, "number out of range"),
    ("model/weight_null.json", with_number("null"), INSPECT, "invalid type: null"),
    ("model/weight_bool.json", with_number("true"), INSPECT, "invalid type: boolean"),
    ("model/ragged_rows.json",
     js(model([{"kind": "dense", "weights": [[1, 2, 3], [1, 2]], "bias": [0, 0]}])), INSPECT,
     "layers[0].weights: row 1 has 2 values, expected 3"),
    ("model/no_rows.json", js(model([{"kind": "dense", "weights": [], "bias": []}])), INSPECT,
     "layers[0].weights: has no rows"),
    ("model/bias_too_short.json", js(model([{"kind": "dense", "weights": [[1, 2, 3]] * 2, "bias": [0]}])),
     INSPECT, "layers[0].bias: has 1 values, expected 2"),
    ("model/layer_size_mismatch.json", js(model([dense(4, 3), {"kind": "relu"}, dense(2, 5)])), INSPECT,
     "layers[2].weights: row 0 has 5 values, expected 4"),
    ("model/std_zero.json",
     js(model([{"kind": "normalize", "mean": [0, 0, 0], "std": [1, 0, 1]}, dense(2, 3)])), INSPECT,
     "layers[0].std: entry 1 is 0, expected > 0"),
    ("model/std_negative.json",
     js(model([{"kind": "normalize", "mean": [0, 0, 0], "std": [1, 1, -2]}, dense(2, 3)])), INSPECT,
     "layers[0].std: entry 2 is -2, expected > 0"),
    ("model/mean_wrong_length.json",
     js(model([{"kind": "normalize", "mean": [0, 0], "std": [1, 1, 1]}, dense(2, 3)])), INSPECT,
     "layers[0].mean: has 2 values, expected 3"),
    ("model/lower_above_upper.json",
     js({**GOOD_PLAIN, "input": {"dim": 3, "lower": [0, 2, 0], "upper": [1, 1, 1]}}), INSPECT,
     "input: feature 1: lower 2 is above upper 1"),
    ("model/lower_wrong_length.json",
     js({**GOOD_PLAIN, "input": {"dim": 3, "lower": [0, 0]}}), INSPECT, "input.lower: has 2 values, expected 3"),
    ("model/classes_wrong_count.json", js({**GOOD_PLAIN, "classes": ["a", "b", "c"]}), INSPECT,
     "classes: has 3 names, expected 2"),
    ("model/names_wrong_count.json",
     js({**GOOD_PLAIN, "input": {"dim": 3, "names": ["a", "b"]}}), INSPECT, "input.names: has 2 names, expected 3"),
    ("model/names_duplicate.json",
     js({**GOOD_PLAIN, "input": {"dim": 3, "names": ["a", "b", "a"]}}), INSPECT,
     "input.names[2]: \"a\" appears twice"),
    ("model/unknown_input_key.json",
     js({**GOOD_PLAIN, "input": {"dim": 3, "min": 0}}), INSPECT, "unknown field `min`"),
    # serde_json's recursion limit (128) must turn deep nesting into an error, not a stack overflow.
    ("model/nested_arrays_100000.json", provenance_model(nested_arrays(100_000)), INSPECT, "recursion limit exceeded"),
    ("model/nested_objects_100000.json", provenance_model(nested_objects(100_000)), INSPECT,
     "recursion limit exceeded"),
    ("model/nested_arrays_top_level.json", nested_arrays(100_000), INSPECT, "recursion limit exceeded"),
    ("model/invalid_utf8.json", js(GOOD_PLAIN).replace(b'"relu"', b'"rel\xff\xfe"'), INSPECT, "not valid UTF-8"),
    ("model/utf16_with_bom.json", "\ufeff".encode("utf-16-le") + js(GOOD_PLAIN).decode().encode("utf-16-le"),
     INSPECT, "not valid UTF-8"),
    ("model/bom_then_garbage.json", b"\xef\xbb\xbf" + b"model: yes", INSPECT, "JSON syntax error at line 1"),
    # Small files whose folded network would be huge: dense layers without a ReLU between them multiply
    # out (wide -> 1 -> wide gives a wide x wide map), and a wide normalize layer folds through a diagonal.
    ("model/fold_blowup_dense_chain.json",
     js(model([dense(1, WIDE), dense(WIDE, 1)], dim=WIDE)), INSPECT, "above the limit of 20000000"),
    ("model/fold_blowup_normalize.json",
     js(model([{"kind": "normalize", "mean": [0.0] * WIDE, "std": [1.0] * WIDE}, dense(1, WIDE)], dim=WIDE)),
     INSPECT, "above the limit of 20000000"),
    # ---- data files (CSV) --------------------------------------------------------------------------
    ("data/empty.csv", b"", EVAL_PLAIN, "row 1 (header): empty file"),
    ("data/header_only.csv", HEADER3.encode(), EVAL_PLAIN, "file: no data rows"),
    ("data/no_label_column.csv", b"x0,x1,x2,x3\n0,0,0,0\n", EVAL_PLAIN, "row 1 (header): no label column \"label\""),
    ("data/duplicate_columns.csv", b"label,x0,x1,x1\n0,0,0,0\n", EVAL_PLAIN,
     "row 1 (header), column 4: column name \"x1\" appears twice"),
    ("data/too_few_columns.csv", b"label,x0,x1\n0,0,0\n", EVAL_PLAIN, "row 1 (header): 2 feature columns, expected 3"),
    ("data/row_too_long.csv", (HEADER3 + "0,0,0,0\n1,0,0,0,0\n").encode(), EVAL_PLAIN,
     "row 3: has 5 fields, expected 4"),
    ("data/row_too_short.csv", (HEADER3 + "0,0,0,0\n1,0\n").encode(), EVAL_PLAIN, "row 3: has 2 fields, expected 4"),
    ("data/label_out_of_range.csv", (HEADER3 + "0,0,0,0\n2,0,0,0\n").encode(), EVAL_PLAIN,
     "row 3, column \"label\": class index 2 is out of range"),
    ("data/label_negative.csv", (HEADER3 + "-1,0,0,0\n").encode(), EVAL_PLAIN, "row 2, column \"label\": \"-1\""),
    ("data/label_fraction.csv", (HEADER3 + "1.0,0,0,0\n").encode(), EVAL_PLAIN, "row 2, column \"label\": \"1.0\""),
    ("data/label_huge.csv", (HEADER3 + "99999999999999999999999999,0,0,0\n").encode(), EVAL_PLAIN,
     "row 2, column \"label\""),
    ("data/label_empty.csv", (HEADER3 + ",0,0,0\n").encode(), EVAL_PLAIN, "row 2, column \"label\""),
    ("data/label_unknown_class.csv", (NAMED_HEADER + "normal,1,20\nbroken,1,20\n").encode(), EVAL_NAMED,
     "row 3, column \"label\": \"broken\" is neither a class index nor one of the classes"),
    ("data/value_not_a_number.csv", (HEADER3 + "0,0,abc,0\n").encode(), EVAL_PLAIN,
     "row 2, column \"x1\": \"abc\" is not a number"),
    ("data/value_empty.csv", (HEADER3 + "0,0,,0\n").encode(), EVAL_PLAIN, "row 2, column \"x1\": \"\" is not a number"),
    ("data/value_nan.csv", (HEADER3 + "0,0,0,0\n0,NaN,0,0\n").encode(), EVAL_PLAIN,
     "row 3, column \"x0\": \"NaN\" is not a finite number"),
    ("data/value_inf.csv", (HEADER3 + "0,0,0,inf\n").encode(), EVAL_PLAIN, "row 2, column \"x2\": \"inf\" is not a finite"),
    ("data/value_minus_infinity.csv", (HEADER3 + "0,-Infinity,0,0\n").encode(), EVAL_PLAIN,
     "row 2, column \"x0\": \"-Infinity\" is not a finite"),
    ("data/value_1e999.csv", (HEADER3 + "0,0,1e999,0\n").encode(), EVAL_PLAIN, "row 2, column \"x1\": \"1e999\" is not a finite"),
    ("data/value_huge_exponent.csv", (HEADER3 + "0,0,1e300,0\n").encode(), EVAL_PLAIN,
     "row 2, column \"x1\": 1e300 lies outside the model's input range [0, 1]"),
    ("data/value_hex.csv", (HEADER3 + "0,0x1,0,0\n").encode(), EVAL_PLAIN, "row 2, column \"x0\": \"0x1\" is not a number"),
    ("data/value_out_of_range.csv", (NAMED_HEADER + "worn,11,20\n").encode(), EVAL_NAMED,
     "row 2, column \"speed\": 11 lies outside the model's input range [0, 10]"),
    ("data/value_with_nul_bytes.csv", (HEADER3 + "0,0,0\x00\x00,0\n").encode(), EVAL_PLAIN, "row 2, column \"x1\""),
    ("data/missing_named_column.csv", b"label,speed\nnormal,1\n", EVAL_NAMED,
     "row 1 (header): missing feature column \"temp\""),
    ("data/extra_named_column.csv", b"label,speed,temp,humidity\nnormal,1,20,3\n", EVAL_NAMED,
     "row 1 (header), column 4: column \"humidity\" is not an input of the model"),
    ("data/invalid_utf8.csv", (HEADER3 + "0,0,0,0\n").encode() + b"1,0,\xc3\x28,0\n", EVAL_PLAIN, "not valid UTF-8"),
    ("data/utf16_with_bom.csv", "\ufeff".encode("utf-16-le") + (HEADER3 + "0,0,0,0\n").encode("utf-16-le"),
     EVAL_PLAIN, "not valid UTF-8"),
    ("data/bom_then_bad_label.csv", b"\xef\xbb\xbf" + (HEADER3 + "7,0,0,0\n").encode(), EVAL_PLAIN,
     "row 2, column \"label\": class index 7"),
    ("data/crlf_bad_value_row4.csv", (HEADER3 + "0,0,0,0\n1,1,1,1\n0,0,x,0\n").replace("\n", "\r\n").encode(),
     EVAL_PLAIN, "row 4, column \"x1\": \"x\" is not a number"),
    ("data/unterminated_quote.csv", (HEADER3 + '0,"0,0,0\n1,0,0,0\n').encode(), EVAL_PLAIN, "row 2"),
    ("data/digits_wrong_width_row.csv", (DIGITS_HEADER + digits_row() + digits_row()[:-5] + "\n").encode(),
     EVAL_DIGITS, "row 3: has 64 fields, expected 65"),
    ("data/digits_nan_pixel.csv", (DIGITS_HEADER + digits_row(override={17: "nan"})).encode(), EVAL_DIGITS,
     "row 2, column \"px17\": \"nan\" is not a finite number"),
    ("data/digits_label_ten.csv", (DIGITS_HEADER + digits_row() + digits_row(label="10")).encode(), EVAL_DIGITS,
     "row 3, column \"label\": class index 10 is out of range, expected 0..9"),
    ("data/model_is_not_csv.csv", js(GOOD_PLAIN), EVAL_PLAIN, "row 1 (header)"),
    # ---- requirement files (TOML / JSON) --------------------------------------------------------
    ("requirement/eps_negative.toml", b"epsilon = -0.1\n", REQUIREMENT, "epsilon: -0.1 is not allowed"),
    ("requirement/eps_nan.toml", b"epsilon = nan\n", REQUIREMENT, "epsilon: NaN is not allowed"),
    ("requirement/eps_inf.toml", b"epsilon = inf\n", REQUIREMENT, "epsilon: inf is not allowed"),
    ("requirement/eps_nan_string.json", b'{"epsilon": "NaN"}', REQUIREMENT, "epsilon: NaN is not allowed"),
    ("requirement/eps_1e999.json", b'{"epsilon": 1e999}', REQUIREMENT, "number out of range at line 1 column 17"),
    ("requirement/eps_list_with_negative.json", b'{"epsilon": [0.1, -0.2]}', REQUIREMENT,
     "epsilon: -0.2 is not allowed"),
    ("requirement/eps_empty_list.json", b'{"epsilon": []}', REQUIREMENT, "epsilon: empty list"),
    ("requirement/eps_not_a_number.toml", b'epsilon = "small"\n', REQUIREMENT, "epsilon: \"small\" is not a number"),
    ("requirement/eps_range_too_many.toml", b'epsilon = "0:1:1e-9"\n', REQUIREMENT,
     "epsilon: range \"0:1:1e-9\" has 1000000000 values, at most 1000"),
    # (1 - 0) / 1e-320 is infinite: the value count must saturate, not overflow
    ("requirement/eps_range_count_overflow.toml", b'epsilon = "0:1:1e-320"\n', REQUIREMENT,
     "epsilon: range \"0:1:1e-320\" has 18446744073709551615 values"),
    ("requirement/eps_range_backwards.toml", b'epsilon = "0.5:0.1:0.1"\n', REQUIREMENT, "needs step > 0 and stop"),
    ("requirement/eps_range_zero_step.toml", b'epsilon = "0.1:0.5:0"\n', REQUIREMENT, "needs step > 0 and stop"),
    ("requirement/eps_range_two_parts.json", b'{"epsilon": "0.1:0.5"}', REQUIREMENT, "is not a range"),
    ("requirement/floor_above_one.toml", b"epsilon = 0.1\nfloor = 1.5\n", REQUIREMENT,
     "floor: 1.5 is not allowed, expected a fraction in [0, 1]"),
    ("requirement/floor_negative.json", b'{"epsilon": 0.1, "floor": -0.1}', REQUIREMENT, "floor: -0.1 is not allowed"),
    ("requirement/floor_nan.toml", b"epsilon = 0.1\nfloor = nan\n", REQUIREMENT, "floor: NaN is not allowed"),
    ("requirement/min_clean_accuracy_two.toml", b"epsilon = 0.1\nmin_clean_accuracy = 2\n", REQUIREMENT,
     "min_clean_accuracy: 2 is not allowed"),
    ("requirement/confidence_one.toml", b"epsilon = 0.1\nconfidence = 1.0\n", REQUIREMENT,
     "confidence: 1 is not allowed, expected a level strictly between 0 and 1"),
    ("requirement/confidence_zero.json", b'{"epsilon": 0.1, "confidence": 0}', REQUIREMENT, "confidence: 0 is not allowed"),
    ("requirement/unknown_norm.toml", b'epsilon = 0.1\nnorm = "l1"\n', REQUIREMENT, "norm: unknown norm \"l1\""),
    ("requirement/forbid_unknown_class.toml", b'epsilon = 0.1\nforbid_into = ["cat"]\n', REQUIREMENT,
     "forbid_into: \"cat\" is not a class of the model"),
    ("requirement/forbid_class_index_out_of_range.json", b'{"epsilon": 0.1, "forbid_into": ["7"]}', REQUIREMENT,
     "forbid_into: \"7\" is not a class of the model"),
    ("requirement/forbid_empty.toml", b"epsilon = 0.1\nforbid_into = []\n", REQUIREMENT, "forbid_into: empty list"),
    ("requirement/forbid_from_alone.toml", b'epsilon = 0.1\nforbid_from = ["worn"]\n', REQUIREMENT,
     "forbid_from: restricts which classes"),
    ("requirement/unknown_key.json", b'{"epsilon": 0.1, "flor": 0.9}', REQUIREMENT, "unknown field `flor`"),
    ("requirement/truncated.json", b'{"epsilon": 0.1, "floor": 0.', REQUIREMENT, "at line 1 column"),
    ("requirement/nested_arrays.json", b'{"epsilon": ' + nested_arrays(100_000) + b"}", REQUIREMENT,
     "recursion limit exceeded"),
    ("requirement/wrong_extension.yaml", b"epsilon: 0.1\n", REQUIREMENT, "unknown requirement file type \".yaml\""),
    ("requirement/invalid_utf8.toml", b"epsilon = 0.1\n# \xff\xfe\n", REQUIREMENT, "not valid UTF-8"),
    ("requirement/inline_tolerance_negative.toml", b"[tolerances]\nspeed = -1.0\ntemp = 1.0\n", REQUIREMENT,
     "tolerances.speed: -1 is not allowed"),
    ("requirement/inline_tolerance_unknown_feature.toml", b"[tolerances]\nspeed = 1.0\ntemp = 1.0\nrpm = 2.0\n",
     REQUIREMENT, "tolerances.rpm: \"rpm\" is not an input feature"),
    # ---- per-feature tolerance files ----------------------------------------------------------------
    ("tolerances/negative.csv", b"feature,tolerance\nspeed,0.5\ntemp,-1\n", TOLERANCES,
     "row 3, column \"tolerance\": -1 is not allowed"),
    ("tolerances/nan.csv", b"feature,tolerance\nspeed,NaN\ntemp,1\n", TOLERANCES,
     "row 2, column \"tolerance\": NaN is not allowed"),
    ("tolerances/inf.csv", b"feature,tolerance\nspeed,1\ntemp,inf\n", TOLERANCES,
     "row 3, column \"tolerance\": inf is not allowed"),
    ("tolerances/not_a_number.csv", b"feature,tolerance\nspeed,fast\ntemp,1\n", TOLERANCES,
     "row 2, column \"tolerance\": \"fast\" is not a number"),
    ("tolerances/no_header.csv", b"speed,1\ntemp,1\n", TOLERANCES, "row 1 (header): expected the columns"),
    ("tolerances/unknown_feature.json", b'{"speed": 1, "temp": 1, "rpm": 2}', TOLERANCES,
     "\"rpm\": \"rpm\" is not an input feature of the model"),
    ("tolerances/missing_feature.csv", b"feature,tolerance\nspeed,1\n", TOLERANCES,
     "no tolerance for feature \"temp\""),
    ("tolerances/duplicate_feature.csv", b"feature,tolerance\nspeed,1\ntemp,1\nspeed,2\n", TOLERANCES,
     "row 4, column \"tolerance\": feature \"speed\" is given twice"),
    ("tolerances/string_value.json", b'{"speed": "fast", "temp": 1}', TOLERANCES, "\"speed\": \"fast\" is not a number"),
    ("tolerances/number_1e999.json", b'{"speed": 1e999, "temp": 1}', TOLERANCES, "number out of range"),
    ("tolerances/nested_arrays.json", b'{"speed": ' + nested_arrays(100_000) + b"}", TOLERANCES,
     "recursion limit exceeded"),
    ("tolerances/invalid_utf8.csv", b"feature,tolerance\nsp\xffeed,1\n", TOLERANCES, "not valid UTF-8"),
    # ---- saved reports (ballast sheet) --------------------------------------------------------------
    ("report/empty.json", b"", SHEET, "EOF while parsing a value at line 1 column 0"),
    ("report/truncated.json", None, SHEET, "EOF while parsing"),
    ("report/wrong_format.json", lambda: report_set(["format"], "ballast.report/9"), SHEET,
     "format \"ballast.report/9\" is not ballast.report/1"),
    ("report/no_format.json", lambda: report_without("format"), SHEET, "no \"format\" key"),
    ("report/not_an_object.json", b"[]", SHEET, "no \"format\" key"),
    ("report/missing_summary.json", lambda: report_without("summary"), SHEET, "missing field `summary`"),
    ("report/samples_wrong_type.json", lambda: report_set(["samples"], "many"), SHEET, "invalid type: string \"many\""),
    ("report/unknown_status.json", lambda: report_with(lambda d: d["samples"][0].update(status="proved")), SHEET,
     "unknown variant `proved`"),
    ("report/negative_count.json", lambda: report_set(["summary", "samples"], -1), SHEET,
     "invalid value: integer `-1`"),
    ("report/nested_arrays.json", b'{"format": "ballast.report/1", "x": ' + nested_arrays(100_000) + b"}", SHEET,
     "recursion limit exceeded"),
    ("report/invalid_utf8.json", lambda: report_set(["model", "name"], "X").replace(b'"X"', b'"\xc0\xaf"'), SHEET,
     "not valid UTF-8"),
    # ---- the same loaders behind the other commands ------------------------------------------------
    ("model/for_attack_bias_nan_string.json",
     js(model([{"kind": "dense", "weights": [[1, 2, 3]], "bias": ["NaN"]}])),
     "attack --model {bad} --data {plain_data} --eps 0.1 --out {out}/cx.csv", "invalid type: string \"NaN\""),
    ("data/for_attack_label_out_of_range.csv", (HEADER3 + "5,0,0,0\n").encode(),
     "attack --model {plain} --data {bad} --eps 0.1 --out {out}/cx.csv", "row 2, column \"label\": class index 5"),
    ("model/for_retrain_unknown_kind.json", js(model([dense(2, 3), {"kind": "softmax"}])),
     "retrain --model {bad} --train {plain_data} --eps 0.1 --floor 0.5 --out {out}/m2.json", "layers[1]"),
    ("data/for_retrain_value_inf.csv", (HEADER3 + "0,0,0,0\n1,inf,0,0\n").encode(),
     "retrain --model {plain} --train {bad} --eps 0.1 --floor 0.5 --out {out}/m2.json",
     "row 3, column \"x0\": \"inf\" is not a finite number"),
    ("model/for_certify_std_zero.json",
     js(model([{"kind": "normalize", "mean": [0, 0, 0], "std": [0, 1, 1]}, dense(2, 3)])),
     "certify --model {bad} --data {plain_data} --eps 0.1 --report {out}/r.json --sheet {out}/sheet",
     "layers[0].std: entry 0 is 0"),
    ("data/for_certify_duplicate_columns.csv", b"label,x0,x0,x2\n0,0,0,0\n",
     "certify --model {plain} --data {bad} --eps 0.1 --report {out}/r.json --sheet {out}/sheet",
     "column name \"x0\" appears twice"),
    # ---- requirement files: syntax and shape ------------------------------------------------------
    ("requirement/truncated.toml", b"epsilon = [0.1,\n", REQUIREMENT, "truncated.toml: line 2"),
    ("requirement/unknown_key.toml", b"epsilonn = 0.1\n", REQUIREMENT, "unknown field `epsilonn`"),
    ("requirement/eps_wrong_type.toml", b"epsilon = true\n", REQUIREMENT, "epsilon = true"),
    ("requirement/not_an_object.json", b"[0.1]", REQUIREMENT, "not_an_object.json: expected a JSON object"),
    ("requirement/tolerance_file_missing.toml", b'tolerances = "no-such-tolerances.csv"\n', REQUIREMENT,
     "tolerance_file_missing.toml: tolerances"),
    # ---- arguments ---------------------------------------------------------------------------------
    ("data/good_but_label_column_missing.csv", (HEADER3 + "0,0,0,0\n").encode(),
     "evaluate --model {plain} --data {bad} --label-column target", "no label column \"target\""),
]

# Cases that still break the contract because of a known bug in code this corpus does not own. Each is
# run too; the test fails once one of them passes, so it gets moved into CASES.
KNOWN_BUGS = [
]


def main():
    os.makedirs(os.path.join(ROOT, "good"), exist_ok=True)
    with open(os.path.join(ROOT, "good", "plain3.model.json"), "w") as f:
        json.dump(GOOD_PLAIN, f, indent=1)
        f.write("\n")
    with open(os.path.join(ROOT, "good", "two_sensor.model.json"), "w") as f:
        json.dump(GOOD_NAMED, f, indent=1)
        f.write("\n")
    with open(os.path.join(ROOT, "good", "plain3.csv"), "w") as f:
        f.write(GOOD_PLAIN_CSV)
    with open(os.path.join(ROOT, "good", "two_sensor.csv"), "w") as f:
        f.write(GOOD_NAMED_CSV)
    seen = set()
    lines = [
        "# The bad-input corpus: one case per line, fields separated by ' | ':",
        "# file (relative to tests/bad-input) | command (placeholders filled by tests/bad_input.rs) |",
        "# text the one-line error message must contain [| known bug: why it still fails]. Written by",
        "# make_corpus.py; edit that, not this.",
    ]
    for path, content, command, expected, *bug in CASES + KNOWN_BUGS:
        if content is None and path == "report/truncated.json":
            content = js(good_report())[:300]
        elif callable(content):
            content = content()
        assert path not in seen, path
        assert "|" not in command and "|" not in expected and "\n" not in expected, path
        seen.add(path)
        full = os.path.join(ROOT, path)
        os.makedirs(os.path.dirname(full), exist_ok=True)
        with open(full, "wb") as f:
            f.write(content)
        assert all("|" not in b for b in bug), path
        lines.append(" | ".join([path, command, expected] + [f"known bug: {b}" for b in bug]))
    with open(os.path.join(ROOT, "manifest.txt"), "w") as f:
        f.write("\n".join(lines) + "\n")
    print(f"{len(CASES)} cases")


if __name__ == "__main__":
    main()
