//! The bad-input catalogue: every case runs the real binary on files made in a fresh temp
//! directory (copies of the tiny fixture models under tests/fixtures/runner/, broken in one
//! way) and checks the contract of docs/interface.md, "Exit codes": exit 2, a message on stderr
//! naming the file (and the line and field where there is one), and no output file, complete
//! or partial, afterwards (not even a leftover temporary file).
//!
//! Cases are grouped by the input they break: question sets, answers and grades that do not
//! match the set, model directories, adapters, chat templates, policy files and shards that do
//! not belong together. Each case is
//! its own test, named after the input and the fault, so one runs alone with
//! `cargo test --test bad_inputs question_set_duplicate_id`, and a group with a prefix
//! (`cargo test --test bad_inputs adapter_`). `-- --nocapture` shows every message.

mod common;

use common::Bin;
use serde_json::{json, Value};
use std::ffi::OsString;
use std::io::Write;
use std::path::{Path, PathBuf};
use std::time::Duration;

/// A valid three-question set (two in scope, one out of scope).
const SET: &str = r#"{"id": "q1", "question": "When does the first boat leave Gull Point?", "references": ["At 06:50."], "category": "timetables"}
{"id": "q2", "question": "Can I bring my dog on the ferry?", "references": ["Yes, dogs travel free on a lead."], "category": "pets"}
{"id": "q3", "question": "What will the weather be on Saturday?", "references": [], "category": "out-of-scope", "expect": "refuse"}
"#;

const IDS: [&str; 3] = ["q1", "q2", "q3"];

/// What one case runs and expects.
struct Setup {
    args: Vec<OsString>,
    /// Files and directories that must not exist after the run.
    outputs: Vec<PathBuf>,
    /// Every string must appear in stderr.
    needles: Vec<String>,
}

/// One test per case: `bad_input!(name, |dir| -> Setup)` makes `#[test] fn name()` that
/// builds the case in a fresh temp dir with the setup function and checks it with [`check`].
macro_rules! bad_input {
    ($name:ident, $setup:expr) => {
        #[test]
        fn $name() {
            check(stringify!($name), $setup);
        }
    };
}

/// The number of cases below; a case that disappears fails
/// `catalogue_keeps_every_case`, so none is dropped by accident.
const CASES: usize = 103;

fn runner(family: &str) -> PathBuf {
    common::fixture("runner").join(family)
}

fn s(x: &str) -> OsString {
    OsString::from(x)
}

fn needles(list: &[&str]) -> Vec<String> {
    list.iter().map(|n| n.to_string()).collect()
}

fn write(dir: &Path, name: &str, text: &str) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, text).unwrap();
    p
}

fn write_set(dir: &Path) {
    write(dir, "set.jsonl", SET);
}

fn answer_row(id: &str, answer: &str) -> String {
    json!({"id": id, "answer": answer, "finish": "eos", "prompt_tokens": 30, "new_tokens": 8, "ms": 3})
        .to_string()
}

fn answers_for(ids: &[&str]) -> String {
    ids.iter()
        .map(|id| answer_row(id, "At 06:50, dogs travel free."))
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

fn grade_row(id: &str) -> Value {
    let refuse = id == "q3";
    json!({
        "id": id,
        "category": match id { "q1" => "timetables", "q2" => "pets", _ => "out-of-scope" },
        "expect": if refuse { "refuse" } else { "answer" },
        "exact_match": if refuse { Value::Null } else { json!(1) },
        "token_f1": if refuse { Value::Null } else { json!(1.0) },
        "rouge_l": if refuse { Value::Null } else { json!(1.0) },
        "refused": refuse,
        "answer": "At 06:50."
    })
}

fn grades_for(ids: &[&str]) -> String {
    ids.iter()
        .map(|id| grade_row(id).to_string())
        .collect::<Vec<_>>()
        .join("\n")
        + "\n"
}

/// `grade --questions set.jsonl --answers answers.jsonl --out grades.jsonl`.
fn grade(dir: &Path, extra: &[&str], needles_: &[&str]) -> Setup {
    let mut args = vec![
        s("grade"),
        s("--questions"),
        s("set.jsonl"),
        s("--answers"),
        s("answers.jsonl"),
        s("--out"),
        s("grades.jsonl"),
    ];
    args.extend(extra.iter().map(|a| s(a)));
    Setup {
        args,
        outputs: vec![dir.join("grades.jsonl"), dir.join("grades.jsonl.run.json")],
        needles: needles(needles_),
    }
}

/// `weigh` of baseline.grades.jsonl against candidate.grades.jsonl into report/.
fn weigh(dir: &Path, extra: &[&str], needles_: &[&str]) -> Setup {
    let mut args = vec![
        s("weigh"),
        s("--questions"),
        s("set.jsonl"),
        s("--baseline"),
        s("baseline.grades.jsonl"),
        s("--candidate"),
        s("candidate.grades.jsonl"),
        s("--report"),
        s("report"),
        s("--resamples"),
        s("1000"),
    ];
    args.extend(extra.iter().map(|a| s(a)));
    Setup {
        args,
        // The report and the default history file beside it: neither may appear.
        outputs: vec![dir.join("report"), dir.join("history.sqlite")],
        needles: needles(needles_),
    }
}

/// `answer` with the model (and adapter) under `dir` on set.jsonl.
fn answer(dir: &Path, adapter: bool, needles_: &[&str]) -> Setup {
    let mut args = vec![
        s("answer"),
        s("--model"),
        s("model"),
        s("--questions"),
        s("set.jsonl"),
        s("--out"),
        s("answers.jsonl"),
        s("--max-new-tokens"),
        s("4"),
    ];
    if adapter {
        args.extend([s("--adapter"), s("adapter")]);
    }
    Setup {
        args,
        outputs: vec![
            dir.join("answers.jsonl"),
            dir.join("answers.jsonl.run.json"),
            dir.join("answers.jsonl.partial"),
        ],
        needles: needles(needles_),
    }
}

fn copy_dir(src: &Path, dst: &Path) {
    common::copy_tree(src, dst);
}

/// set.jsonl plus a copy of the llama fixture model as `model/`.
fn model_case(dir: &Path) -> PathBuf {
    write_set(dir);
    let m = dir.join("model");
    copy_dir(&runner("llama").join("model"), &m);
    m
}

/// [`model_case`] plus a copy of the llama `qv` adapter as `adapter/`.
fn adapter_case(dir: &Path) -> PathBuf {
    model_case(dir);
    let a = dir.join("adapter");
    copy_dir(&runner("llama").join("adapters/qv"), &a);
    a
}

fn edit_json(path: &Path, f: impl FnOnce(&mut Value)) {
    let mut v: Value = serde_json::from_str(&std::fs::read_to_string(path).unwrap()).unwrap();
    f(&mut v);
    std::fs::write(path, serde_json::to_string_pretty(&v).unwrap()).unwrap();
}

/// The header of a safetensors file: (header length, header JSON).
fn st_header(bytes: &[u8]) -> (usize, Value) {
    let n = u64::from_le_bytes(bytes[..8].try_into().unwrap()) as usize;
    (n, serde_json::from_slice(&bytes[8..8 + n]).unwrap())
}

/// Overwrites element `index` of the F32 tensor `name` in a safetensors file.
fn poke_f32(path: &Path, name: &str, index: usize, value: f32) {
    let mut bytes = std::fs::read(path).unwrap();
    let (n, header) = st_header(&bytes);
    assert_eq!(header[name]["dtype"], "F32", "{name}");
    let start = header[name]["data_offsets"][0].as_u64().unwrap() as usize;
    let at = 8 + n + start + 4 * index;
    bytes[at..at + 4].copy_from_slice(&value.to_le_bytes());
    std::fs::write(path, bytes).unwrap();
}

/// Writes a safetensors file of F32 tensors filled with 0.01.
fn write_safetensors(path: &Path, tensors: &[(&str, &[usize])]) {
    let mut header = serde_json::Map::new();
    let mut data = Vec::new();
    for (name, shape) in tensors {
        let count: usize = shape.iter().product();
        let start = data.len();
        for _ in 0..count {
            data.extend_from_slice(&0.01f32.to_le_bytes());
        }
        header.insert(
            name.to_string(),
            json!({"dtype": "F32", "shape": shape, "data_offsets": [start, data.len()]}),
        );
    }
    let mut h = serde_json::to_vec(&Value::Object(header)).unwrap();
    while !h.len().is_multiple_of(8) {
        h.push(b' ');
    }
    let mut out = (h.len() as u64).to_le_bytes().to_vec();
    out.extend_from_slice(&h);
    out.extend_from_slice(&data);
    std::fs::write(path, out).unwrap();
}

const TEMPLATE_RUNAWAY_SECS: f64 = 5.0;

fn template_case(dir: &Path, template: &str, needles_: &[&str]) -> Setup {
    let m = model_case(dir);
    std::fs::write(m.join("chat_template.jinja"), template).unwrap();
    let mut all = vec!["chat_template.jinja"];
    all.extend_from_slice(needles_);
    answer(dir, false, &all)
}

fn policy_case(dir: &Path, policy: &str, needles_: &[&str]) -> Setup {
    write_set(dir);
    write(dir, "answers.jsonl", &answers_for(&IDS));
    write(dir, "policy.toml", policy);
    let mut all = vec!["policy.toml"];
    all.extend_from_slice(needles_);
    grade(dir, &["--policy", "policy.toml"], &all)
}

// ---- question sets ----

bad_input!(question_set_malformed_json_line, |d| {
    write(
        d,
        "set.jsonl",
        &SET.replacen(r#""q2", "question""#, r#""q2" "question""#, 1),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:2:", "not valid JSON"])
});

bad_input!(question_set_duplicate_id, |d| {
    write(
        d,
        "set.jsonl",
        &SET.replace(r#""id": "q3""#, r#""id": "q1""#),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:3: field `id`", "duplicate id \"q1\""])
});

bad_input!(question_set_missing_question_field, |d| {
    write(
        d,
        "set.jsonl",
        &SET.replace(r#""question": "Can I bring my dog on the ferry?", "#, ""),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:2: field `question`", "missing"])
});

bad_input!(
    question_set_missing_references_for_an_answer_question,
    |d| {
        write(
            d,
            "set.jsonl",
            &SET.replace(r#""references": ["At 06:50."], "#, ""),
        );
        write(d, "answers.jsonl", &answers_for(&IDS));
        grade(d, &[], &["set.jsonl:1: field `references`"])
    }
);

bad_input!(question_set_wrongly_typed_id, |d| {
    write(d, "set.jsonl", &SET.replace(r#""id": "q2""#, r#""id": 2"#));
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(
        d,
        &[],
        &[
            "set.jsonl:2: field `id`",
            "expected a string, found a number",
        ],
    )
});

bad_input!(question_set_references_not_an_array, |d| {
    write(
        d,
        "set.jsonl",
        &SET.replace(r#"["At 06:50."]"#, r#""At 06:50.""#),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(
        d,
        &[],
        &[
            "set.jsonl:1: field `references`",
            "expected an array of strings",
        ],
    )
});

bad_input!(question_set_unknown_expect_value, |d| {
    write(
        d,
        "set.jsonl",
        &SET.replace(r#""expect": "refuse""#, r#""expect": "decline""#),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:3: field `expect`", "\"decline\""])
});

bad_input!(question_set_a_line_that_is_not_an_object, |d| {
    write(
        d,
        "set.jsonl",
        &format!("{SET}[\"q4\", \"Where do I park?\"]\n"),
    );
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:4:", "expected a JSON object"])
});

bad_input!(question_set_empty_file, |d| {
    write(d, "set.jsonl", "");
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl", "empty"])
});

bad_input!(question_set_only_blank_lines_answer, |d| {
    model_case(d);
    write(d, "set.jsonl", "\n  \n\t\n");
    answer(d, false, &["set.jsonl", "empty"])
});

bad_input!(question_set_non_utf8_bytes, |d| {
    let mut bytes = SET.as_bytes().to_vec();
    let at = SET.find("dog").unwrap();
    bytes[at] = 0xff;
    std::fs::write(d.join("set.jsonl"), bytes).unwrap();
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:2:", "UTF-8"])
});

bad_input!(question_set_a_50mb_single_line_weigh, |d| {
    let mut f = std::io::BufWriter::new(std::fs::File::create(d.join("set.jsonl")).unwrap());
    f.write_all(br#"{"id": "q1", "question": ""#).unwrap();
    let chunk = vec![b'a'; 1 << 20];
    for _ in 0..50 {
        f.write_all(&chunk).unwrap();
    }
    f.write_all(b"\", \"references\": [\"x\"]}\n").unwrap();
    f.flush().unwrap();
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    weigh(d, &[], &["set.jsonl:1:", "longer than"])
});

bad_input!(question_set_json_nested_100k_levels_deep, |d| {
    let deep = format!("{}{}", "[".repeat(100_000), "]".repeat(100_000));
    // In a known field, so the line is read as a whole JSON value (an unknown field is skipped
    // without building it, so its depth does not matter).
    let line = format!(r#"{{"id": "q0", "question": "Deep?", "references": {deep}}}"#);
    write(d, "set.jsonl", &format!("{SET}{line}\n"));
    write(d, "answers.jsonl", &answers_for(&IDS));
    grade(d, &[], &["set.jsonl:4:", "recursion limit"])
});

bad_input!(
    question_set_malformed_line_stops_answer_before_the_model_loads,
    |d| {
        model_case(d);
        write(d, "set.jsonl", &SET.replacen("}", "", 1));
        answer(d, false, &["set.jsonl:1:", "not valid JSON"])
    }
);

bad_input!(
    question_set_answer_output_would_overwrite_the_questions,
    |d| {
        model_case(d);
        write_set(d);
        let mut setup = answer(d, false, &["--out ./set.jsonl", "--questions"]);
        let at = setup
            .args
            .iter()
            .position(|a| a == "answers.jsonl")
            .unwrap();
        setup.args[at] = s("./set.jsonl");
        // The set must survive unchanged; no journal or run record may appear.
        setup.outputs = vec![d.join("set.jsonl.partial"), d.join("set.jsonl.run.json")];
        setup
    }
);

// ---- answers that do not match the set ----

bad_input!(answers_missing_id, |d| {
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&["q1", "q2"]));
    grade(
        d,
        &[],
        &["answers.jsonl", "has 2 rows", "first missing id \"q3\""],
    )
});

bad_input!(answers_extra_id, |d| {
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&["q1", "q2", "q3", "q4"]));
    grade(d, &[], &["answers.jsonl:4: field `id`", "extra row \"q4\""])
});

bad_input!(answers_reordered_ids, |d| {
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&["q2", "q1", "q3"]));
    grade(
        d,
        &[],
        &[
            "answers.jsonl:1: field `id`",
            "expected \"q1\"",
            "found \"q2\"",
        ],
    )
});

bad_input!(answers_made_from_a_different_set_fingerprint, |d| {
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&IDS));
    write(
            d,
            "answers.jsonl.run.json",
            &json!({"tool": "liftgate", "questions": {"path": "old.jsonl", "fingerprint": "0".repeat(64), "count": 3}}).to_string(),
        );
    grade(
        d,
        &[],
        &[
            "answers.jsonl.run.json: field `questions.fingerprint`",
            "different question set",
        ],
    )
});

bad_input!(answers_wrongly_typed_field, |d| {
    write_set(d);
    let rows = answers_for(&IDS).replacen("\"finish\":\"eos\"", "\"finish\":\"tired\"", 2);
    let rows = rows.replacen("\"finish\":\"tired\"", "\"finish\":\"eos\"", 1);
    write(d, "answers.jsonl", &rows);
    grade(d, &[], &["answers.jsonl:2: field `finish`", "tired"])
});

bad_input!(answers_missing_field, |d| {
    write_set(d);
    let rows = answers_for(&IDS).replacen("\"answer\":\"At 06:50, dogs travel free.\",", "", 1);
    write(d, "answers.jsonl", &rows);
    grade(d, &[], &["answers.jsonl:1: field `answer`", "missing"])
});

bad_input!(answers_grade_output_would_overwrite_the_answers, |d| {
    write_set(d);
    let rows = answers_for(&IDS);
    write(d, "answers.jsonl", &rows);
    let mut setup = grade(d, &[], &["--out ./answers.jsonl", "--answers"]);
    let last = setup.args.len() - 1;
    setup.args[last] = s("./answers.jsonl");
    // The input must survive unchanged; only the grades sidecar must not appear.
    setup.outputs = vec![d.join("answers.jsonl.run.json"), d.join("grades.jsonl")];
    setup
});

// ---- grades that do not match the set ----

bad_input!(grades_missing_id, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&["q1", "q3"]));
    weigh(
        d,
        &[],
        &["candidate.grades.jsonl:2: field `id`", "expected \"q2\""],
    )
});

bad_input!(grades_extra_id, |d| {
    write_set(d);
    write(
        d,
        "baseline.grades.jsonl",
        &grades_for(&["q1", "q2", "q3", "q3"]),
    );
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    weigh(
        d,
        &[],
        &["baseline.grades.jsonl:4: field `id`", "extra row"],
    )
});

bad_input!(grades_reordered_ids, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(
        d,
        "candidate.grades.jsonl",
        &grades_for(&["q1", "q3", "q2"]),
    );
    weigh(d, &[], &["candidate.grades.jsonl:2: field `id`"])
});

bad_input!(grades_made_from_a_different_set_fingerprint, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    write(
            d,
            "baseline.grades.jsonl.run.json",
            &json!({"tool": "liftgate", "questions": {"path": "set.jsonl", "fingerprint": "ab".repeat(32), "count": 3}}).to_string(),
        );
    weigh(
        d,
        &[],
        &[
            "baseline.grades.jsonl.run.json: field `questions.fingerprint`",
            "different question set",
        ],
    )
});

bad_input!(grades_score_out_of_range, |d| {
    write_set(d);
    write(
        d,
        "baseline.grades.jsonl",
        &grades_for(&IDS).replacen("\"token_f1\":1.0", "\"token_f1\":1.5", 1),
    );
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    weigh(
        d,
        &[],
        &["baseline.grades.jsonl:1: field `token_f1`", "1.5"],
    )
});

bad_input!(grades_expect_contradicts_the_set, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    let rows = grades_for(&IDS).replacen("\"expect\":\"refuse\"", "\"expect\":\"answer\"", 1);
    write(d, "candidate.grades.jsonl", &rows);
    weigh(d, &[], &["candidate.grades.jsonl:3: field `expect`"])
});

bad_input!(grades_wrongly_typed_field, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    let rows = grades_for(&IDS).replacen("\"refused\":false", "\"refused\":\"no\"", 2);
    let rows = rows.replacen("\"refused\":\"no\"", "\"refused\":false", 1);
    write(d, "candidate.grades.jsonl", &rows);
    weigh(
        d,
        &[],
        &[
            "candidate.grades.jsonl:2: field `refused`",
            "expected a boolean",
        ],
    )
});

bad_input!(report_dir_a_directory_in_the_way_of_report_md, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    std::fs::create_dir_all(d.join("report/report.md")).unwrap();
    let mut setup = weigh(d, &[], &["report/report.md", "is a directory"]);
    setup.outputs = vec![d.join("report/summary.json")];
    setup
});

// ---- model directories ----

bad_input!(model_missing_config_json, |d| {
    let m = model_case(d);
    std::fs::remove_file(m.join("config.json")).unwrap();
    answer(d, false, &["config.json"])
});

bad_input!(model_config_json_not_valid_json, |d| {
    let m = model_case(d);
    let text = std::fs::read_to_string(m.join("config.json")).unwrap();
    std::fs::write(
        m.join("config.json"),
        text.replacen("\"hidden_act\": \"silu\",", "\"hidden_act\": silu,", 1),
    )
    .unwrap();
    answer(d, false, &["model/config.json:11:", "not valid JSON"])
});

bad_input!(model_config_json_field_of_the_wrong_type, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| {
        c["num_hidden_layers"] = json!("two")
    });
    answer(d, false, &["config.json", "num_hidden_layers"])
});

bad_input!(model_negative_rms_norm_eps, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| c["rms_norm_eps"] = json!(-1.0));
    answer(d, false, &["model/config.json: field `rms_norm_eps`", "-1"])
});

bad_input!(model_rope_theta_zero, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| {
        c["rope_parameters"]["rope_theta"] = json!(0.0)
    });
    answer(d, false, &["model/config.json: field `rope_theta`"])
});

bad_input!(model_missing_tokenizer_json, |d| {
    let m = model_case(d);
    std::fs::remove_file(m.join("tokenizer.json")).unwrap();
    answer(d, false, &["tokenizer.json"])
});

bad_input!(model_missing_weights, |d| {
    let m = model_case(d);
    std::fs::remove_file(m.join("model.safetensors")).unwrap();
    answer(d, false, &["model", "no model.safetensors"])
});

bad_input!(model_unsupported_architecture, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| {
        c["model_type"] = json!("mamba");
        c["architectures"] = json!(["MambaForCausalLM"]);
    });
    answer(d, false, &["config.json", "mamba", "LlamaForCausalLM"])
});

bad_input!(model_shapes_contradict_config_json, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| {
        c["num_key_value_heads"] = json!(4)
    });
    answer(
        d,
        false,
        &[
            "model.safetensors",
            "k_proj.weight`",
            "[32, 64]",
            "[64, 64]",
        ],
    )
});

bad_input!(
    model_sharded_index_naming_a_shard_outside_the_directory,
    |d| {
        let m = model_case(d);
        std::fs::rename(m.join("model.safetensors"), d.join("outside.safetensors")).unwrap();
        write(
            &m,
            "model.safetensors.index.json",
            &json!({"weight_map": {"model.embed_tokens.weight": "../outside.safetensors"}})
                .to_string(),
        );
        answer(
            d,
            false,
            &[
                "model.safetensors.index.json",
                "weight_map.model.embed_tokens.weight",
            ],
        )
    }
);

bad_input!(model_truncated_safetensors, |d| {
    let m = model_case(d);
    let p = m.join("model.safetensors");
    let bytes = std::fs::read(&p).unwrap();
    std::fs::write(&p, &bytes[..bytes.len() * 3 / 5]).unwrap();
    answer(d, false, &["model.safetensors", "safetensors"])
});

bad_input!(model_safetensors_header_cut_inside, |d| {
    let m = model_case(d);
    let p = m.join("model.safetensors");
    let bytes = std::fs::read(&p).unwrap();
    std::fs::write(&p, &bytes[..100]).unwrap();
    answer(d, false, &["model.safetensors", "safetensors"])
});

bad_input!(model_oversized_safetensors_header, |d| {
    let m = model_case(d);
    let p = m.join("model.safetensors");
    let mut bytes = std::fs::read(&p).unwrap();
    bytes[..8].copy_from_slice(&(1u64 << 40).to_le_bytes());
    std::fs::write(&p, bytes).unwrap();
    answer(d, false, &["model.safetensors", "safetensors"])
});

bad_input!(model_nan_weight, |d| {
    let m = model_case(d);
    poke_f32(
        &m.join("model.safetensors"),
        "model.layers.1.self_attn.q_proj.weight",
        70,
        f32::NAN,
    );
    answer(
        d,
        false,
        &[
            "model.safetensors: field `model.layers.1.self_attn.q_proj.weight`",
            "NaN at element [1, 6]",
        ],
    )
});

bad_input!(model_inf_weight, |d| {
    let m = model_case(d);
    poke_f32(
        &m.join("model.safetensors"),
        "model.norm.weight",
        3,
        f32::NEG_INFINITY,
    );
    answer(
        d,
        false,
        &[
            "model.safetensors: field `model.norm.weight`",
            "-Inf at element [3]",
        ],
    )
});

bad_input!(model_pickle_only_checkpoint_is_refused, |d| {
    let m = model_case(d);
    std::fs::remove_file(m.join("model.safetensors")).unwrap();
    // Not a real pickle: it must be refused by name, never opened.
    write(&m, "pytorch_model.bin", "\u{80}\u{2}cos\nsystem\n");
    answer(d, false, &["pytorch_model.bin", "pickle", "safetensors"])
});

// ---- adapters ----

bad_input!(adapter_made_for_another_base_shapes, |d| {
    let a = adapter_case(d);
    write_safetensors(
        &a.join("adapter_model.safetensors"),
        &[
            (
                "base_model.model.model.layers.0.self_attn.q_proj.lora_A.weight",
                &[4, 96],
            ),
            (
                "base_model.model.model.layers.0.self_attn.q_proj.lora_B.weight",
                &[96, 4],
            ),
        ],
    );
    answer(d, true, &["adapter_model.safetensors", "q_proj"])
});

bad_input!(adapter_made_for_another_architecture_fused_modules, |d| {
    adapter_case(d);
    let a = d.join("adapter");
    std::fs::remove_dir_all(&a).unwrap();
    copy_dir(&runner("phi3").join("adapters/qv"), &a);
    answer(d, true, &["adapter", "qkv_proj"])
});

bad_input!(adapter_unknown_target_module, |d| {
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| {
        c["target_modules"] = json!(["q_proj", "v_proj", "wq_attn"])
    });
    answer(
        d,
        true,
        &["adapter_config.json: field `target_modules`", "wq_attn"],
    )
});

bad_input!(adapter_unknown_peft_type, |d| {
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| {
        c["peft_type"] = json!("LOHA")
    });
    answer(d, true, &["adapter_config.json: field `peft_type`", "LOHA"])
});

bad_input!(adapter_unsupported_option_layer_replication, |d| {
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| {
        c["layer_replication"] = json!([[0, 2], [1, 2]])
    });
    answer(d, true, &["adapter_config.json: field `layer_replication`"])
});

bad_input!(adapter_dora_flag_without_magnitude_vectors, |d| {
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| {
        c["use_dora"] = json!(true)
    });
    answer(d, true, &["adapter_model.safetensors", "use_dora"])
});

bad_input!(adapter_rank_contradicts_its_tensors, |d| {
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| c["r"] = json!(8));
    answer(d, true, &["adapter", "lora_A"])
});

bad_input!(adapter_nan_in_lora_b_is_caught_after_the_merge, |d| {
    let a = adapter_case(d);
    poke_f32(
        &a.join("adapter_model.safetensors"),
        "base_model.model.model.layers.0.self_attn.v_proj.lora_B.weight",
        5,
        f32::NAN,
    );
    let mut setup = answer(
        d,
        true,
        &[
            "adapter_model.safetensors: field `model.layers.0.self_attn.v_proj.weight`",
            "NaN",
            "after merging",
        ],
    );
    setup.args.extend([s("--merge"), s("f32")]);
    setup
});

bad_input!(adapter_nan_unmerged_is_refused_naming_the_tensor, |d| {
    let a = adapter_case(d);
    poke_f32(
        &a.join("adapter_model.safetensors"),
        "base_model.model.model.layers.0.self_attn.v_proj.lora_B.weight",
        5,
        f32::NAN,
    );
    answer(
        d,
        true,
        &[
            "adapter_model.safetensors: field `base_model.model.model.layers.0.self_attn.v_proj.lora_B.weight`",
            "NaN",
        ],
    )
});

// ---- shards given to `gather` ----

bad_input!(base_quant_unknown_name_in_a_candidate_spec, |d| {
    adapter_case(d);
    vet_with(
        d,
        &["--candidate", "name=q,adapter=adapter,base=nf5"],
        &["--candidate name=q,adapter=adapter,base=nf5: base=nf5: expected nf4, nf4-single, fp4 or fp4-single"],
    )
});

bad_input!(base_quant_with_bf16_weights, |d| {
    adapter_case(d);
    let mut setup = answer(
        d,
        true,
        &["a 4-bit base (nf4) computes in f32", "--weights bf16"],
    );
    setup
        .args
        .extend([s("--base"), s("nf4"), s("--weights"), s("bf16")]);
    setup
});

bad_input!(base_quant_with_a_merge, |d| {
    adapter_case(d);
    let mut setup = answer(d, true, &["a 4-bit base (fp4) takes the adapter unmerged"]);
    setup
        .args
        .extend([s("--base"), s("fp4"), s("--merge"), s("f32")]);
    setup
});

bad_input!(base_quant_on_sizes_not_a_multiple_of_the_block, |d| {
    let m = model_case(d);
    edit_json(&m.join("config.json"), |c| {
        c["intermediate_size"] = json!(96)
    });
    let mut setup = answer(
        d,
        false,
        &[
            "config.json",
            "intermediate_size",
            "96 is not a multiple of 64",
        ],
    );
    setup.args.extend([s("--base"), s("nf4")]);
    setup
});

bad_input!(base_quant_with_an_adapter_that_only_merges, |d| {
    model_case(d);
    copy_dir(&runner("llama").join("adapters/head"), &d.join("adapter"));
    let mut setup = answer(
        d,
        true,
        &[
            "adapter_config.json",
            "a 4-bit base takes adapters unmerged only",
        ],
    );
    setup.args.extend([s("--base"), s("nf4-single")]);
    setup
});

/// Answers shard `k` of 3 of set.jsonl with the llama model under `d` into `shard-<k>.jsonl`
/// (with `max_new` new tokens: a different count makes a shard of another run).
fn answer_shard(d: &Path, k: usize, max_new: &str) {
    let mut c = common::command([
        "answer",
        "--model",
        "model",
        "--questions",
        "set.jsonl",
        "--out",
        &format!("shard-{k}.jsonl"),
        "--max-new-tokens",
        max_new,
        "--shard",
        &format!("{k}/3"),
    ]);
    c.current_dir(d).env_remove("LIFTGATE_SHARD");
    let out = c.output().unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
}

/// `gather --questions set.jsonl --out gathered.jsonl` of the given shard files.
fn gather(d: &Path, shards: &[&str], needles_: &[&str]) -> Setup {
    let mut args = [
        "gather",
        "--questions",
        "set.jsonl",
        "--out",
        "gathered.jsonl",
    ]
    .map(s)
    .to_vec();
    args.extend(shards.iter().map(|a| s(a)));
    Setup {
        args,
        outputs: vec![d.join("gathered.jsonl"), d.join("gathered.jsonl.run.json")],
        needles: needles(needles_),
    }
}

bad_input!(gather_missing_shard, |d| {
    model_case(d);
    for k in [0, 2] {
        answer_shard(d, k, "4");
    }
    gather(
        d,
        &["shard-0.jsonl", "shard-2.jsonl"],
        &[
            "shard 1 of 3 is missing (shards are numbered from 0 to 2)",
            "shard-0.jsonl (shard 0)",
            "shard-2.jsonl (shard 2)",
        ],
    )
});

bad_input!(gather_shard_given_twice, |d| {
    model_case(d);
    for k in 0..3 {
        answer_shard(d, k, "4");
    }
    std::fs::copy(d.join("shard-1.jsonl"), d.join("copy.jsonl")).unwrap();
    std::fs::copy(
        d.join("shard-1.jsonl.run.json"),
        d.join("copy.jsonl.run.json"),
    )
    .unwrap();
    gather(
        d,
        &[
            "shard-0.jsonl",
            "shard-1.jsonl",
            "copy.jsonl",
            "shard-2.jsonl",
        ],
        &["copy.jsonl: shard 1 of 3 is given twice", "shard-1.jsonl"],
    )
});

bad_input!(gather_foreign_shard, |d| {
    model_case(d);
    answer_shard(d, 0, "4");
    answer_shard(d, 1, "4");
    answer_shard(d, 2, "5");
    gather(
        d,
        &["shard-0.jsonl", "shard-1.jsonl", "shard-2.jsonl"],
        &[
            "shard-2.jsonl.run.json: field `identity.max_new_tokens`",
            "different run than shard-0.jsonl",
        ],
    )
});

/// `vet` on the llama fixture under `d` with extra arguments, writing into `rep/`.
fn vet_with(d: &Path, extra: &[&str], needles_: &[&str]) -> Setup {
    let mut args = [
        "vet",
        "--model",
        "model",
        "--questions",
        "set.jsonl",
        "--report",
        "rep",
        "--max-new-tokens",
        "4",
    ]
    .map(s)
    .to_vec();
    args.extend(extra.iter().map(|a| s(a)));
    Setup {
        args,
        outputs: vec![d.join("rep")],
        needles: needles(needles_),
    }
}

bad_input!(vet_two_candidates_with_one_name, |d| {
    adapter_case(d);
    vet_with(
        d,
        &[
            "--adapter",
            "adapter",
            "--candidate",
            "name=Candidate,adapter=adapter,merge=f32",
        ],
        &["the name `Candidate` is used by two variants"],
    )
});

bad_input!(vet_candidate_spec_with_an_unknown_key, |d| {
    adapter_case(d);
    vet_with(
        d,
        &["--candidate", "name=e2,adapters=adapter"],
        &["--candidate name=e2,adapters=adapter: unknown key `adapters`"],
    )
});

bad_input!(vet_candidate_adapter_made_for_another_base, |d| {
    adapter_case(d);
    let other = d.join("other");
    copy_dir(&runner("phi3").join("adapters/qv"), &other);
    vet_with(
        d,
        &[
            "--adapter",
            "adapter",
            "--candidate",
            "name=other,adapter=other",
        ],
        &[
            "other/adapter_config.json: field `target_modules`",
            "another base model",
        ],
    )
});

bad_input!(adapter_pickle_only_adapter_is_refused, |d| {
    let a = adapter_case(d);
    std::fs::remove_file(a.join("adapter_model.safetensors")).unwrap();
    write(&a, "adapter_model.bin", "\u{80}\u{2}cos\nsystem\n");
    answer(d, true, &["adapter_model.bin", "pickle"])
});

bad_input!(
    adapter_bad_adapter_found_by_vet_removes_the_report_directory_it_made,
    |d| {
        let a = adapter_case(d);
        edit_json(&a.join("adapter_config.json"), |c| {
            c["peft_type"] = json!("LOHA")
        });
        Setup {
            args: [
                "vet",
                "--model",
                "model",
                "--adapter",
                "adapter",
                "--questions",
                "set.jsonl",
                "--report",
                "rep",
                "--max-new-tokens",
                "4",
            ]
            .map(s)
            .to_vec(),
            outputs: vec![d.join("rep")],
            needles: needles(&["adapter/adapter_config.json: field `peft_type`"]),
        }
    }
);

// ---- chat templates (untrusted code) ----

bad_input!(template_syntax_error, |d| template_case(
    d,
    "{% for m in messages %}{{ m.content }\n",
    &["syntax"]
));

bad_input!(template_syntax_error_in_tokenizer_config_json, |d| {
    let m = model_case(d);
    edit_json(&m.join("tokenizer_config.json"), |c| {
        c["chat_template"] = json!("{% if messages %}{{ messages[0].content }}")
    });
    answer(d, false, &["tokenizer_config.json", "chat_template"])
});

bad_input!(template_raise_exception, |d| {
    template_case(
        d,
        "{{ raise_exception('This model only answers in the harbour office') }}",
        &["This model only answers in the harbour office"],
    )
});

bad_input!(template_endless_nested_loop, |d| {
    template_case(
            d,
            "{% for i in range(99999) %}{% for j in range(99999) %}{% for k in range(99999) %}{% endfor %}{% endfor %}{% endfor %}",
            &["ran too long"],
        )
});

bad_input!(template_range_beyond_the_sandbox_cap, |d| {
    template_case(
        d,
        "{% for i in range(999999999) %}x{% endfor %}",
        &["range"],
    )
});

bad_input!(template_deep_recursion, |d| {
    template_case(
        d,
        "{% macro down(n) %}{{ down(n + 1) }}{% endmacro %}{{ down(0) }}",
        &["recursion"],
    )
});

bad_input!(template_memory_bomb_by_doubling_a_string, |d| {
    template_case(
            d,
            "{% set ns = namespace(s='ferry') %}{% for i in range(60) %}{% set ns.s = ns.s ~ ns.s %}{% endfor %}{{ ns.s|length }}",
            &["ran too long"],
        )
});

bad_input!(template_reading_a_file_is_impossible, |d| {
    template_case(
        d,
        "{% include '/etc/hostname' %}{% for m in messages %}{{ m.content }}{% endfor %}",
        &["template"],
    )
});

// ---- policy files ----

bad_input!(policy_unknown_key, |d| {
    policy_case(
        d,
        "min_questions = 3\n[lift]\nmin_ci_lo = 0.0\n",
        &["policy.toml:3: field `lift.min_ci_lo`", "unknown field"],
    )
});

bad_input!(policy_out_of_range_value, |d| {
    policy_case(
        d,
        "[refusal]\nmin_out_of_scope = 0.5\nmax_false_refusal = 1.5\n",
        &["policy.toml:3: field `refusal.max_false_refusal`", "1.5"],
    )
});

bad_input!(policy_wrongly_typed_value, |d| {
    policy_case(
        d,
        "min_questions = \"ten\"\n",
        &["policy.toml:1: field `min_questions`", "\"ten\""],
    )
});

bad_input!(policy_unknown_metric_name, |d| {
    policy_case(
        d,
        "[lift]\nmetric = \"bleu\"\n",
        &["policy.toml:2: field `lift.metric`", "bleu"],
    )
});

bad_input!(policy_contradiction_allowance_out_of_range, |d| {
    policy_case(
        d,
        "[facts]\nmax_contradiction_increase = 2\n",
        &[
            "policy.toml:2: field `facts.max_contradiction_increase`",
            "from 0 to 1",
        ],
    )
});

bad_input!(grades_fact_recall_out_of_range, |d| {
    write_set(d);
    let rows: Vec<String> = IDS
        .iter()
        .enumerate()
        .map(|(i, id)| {
            let mut row = grade_row(id);
            if i == 1 {
                row["fact_recall"] = json!(1.5);
            }
            row.to_string()
        })
        .collect();
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &(rows.join("\n") + "\n"));
    weigh(d, &[], &["candidate.grades.jsonl:2", "fact_recall", "1.5"])
});

/// A copy of the tiny sentence-embedding fixture (tests/fixtures/embedder/mean) in `dir/emb`,
/// with the set and answers `grade` needs.
fn embedder_copy(dir: &Path) -> PathBuf {
    write_set(dir);
    write(dir, "answers.jsonl", &answers_for(&IDS));
    let emb = dir.join("emb");
    common::copy_tree(&common::fixture("embedder").join("mean"), &emb);
    emb
}

bad_input!(embedder_without_pooling_config, |d| {
    let emb = embedder_copy(d);
    std::fs::remove_file(emb.join("1_Pooling/config.json")).unwrap();
    grade(
        d,
        &["--embedder", "emb"],
        &["1_Pooling/config.json", "not found"],
    )
});

bad_input!(embedder_without_weights, |d| {
    let emb = embedder_copy(d);
    std::fs::remove_file(emb.join("model.safetensors")).unwrap();
    grade(
        d,
        &["--embedder", "emb"],
        &["model.safetensors", "not found"],
    )
});

bad_input!(embedder_unsupported_pooling, |d| {
    let emb = embedder_copy(d);
    write(
        &emb,
        "1_Pooling/config.json",
        r#"{"embedding_dimension": 16, "pooling_mode": "max", "include_prompt": true}"#,
    );
    grade(
        d,
        &["--embedder", "emb"],
        &[
            "1_Pooling/config.json",
            "pooling_mode",
            "\"max\" is not supported",
        ],
    )
});

bad_input!(embedder_not_bert, |d| {
    let emb = embedder_copy(d);
    let path = emb.join("config.json");
    let text = std::fs::read_to_string(&path).unwrap();
    std::fs::write(&path, text.replace("\"bert\"", "\"xlm-roberta\"")).unwrap();
    grade(
        d,
        &["--embedder", "emb"],
        &["config.json", "model_type", "xlm-roberta", "BERT"],
    )
});

bad_input!(policy_gates_on_semantic_without_semantic_scores, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    write(d, "policy.toml", "[lift]\nmetric = \"semantic\"\n");
    weigh(d, &["--policy", "policy.toml"], &["semantic", "--embedder"])
});

bad_input!(grades_semantic_out_of_range, |d| {
    write_set(d);
    let rows: Vec<String> = IDS
        .iter()
        .enumerate()
        .map(|(i, id)| {
            let mut row = grade_row(id);
            if i == 0 {
                row["semantic"] = json!(-1.5);
            }
            row.to_string()
        })
        .collect();
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &(rows.join("\n") + "\n"));
    weigh(d, &[], &["candidate.grades.jsonl:1", "semantic", "-1.5"])
});

bad_input!(training_file_row_without_question, |d| {
    write_set(d);
    write(
        d,
        "train.jsonl",
        "{\"question\": \"Dogs?\"}\n{\"answer\": \"Free.\"}\n",
    );
    Setup {
        args: vec![
            s("leaks"),
            s("--questions"),
            s("set.jsonl"),
            s("--train"),
            s("train.jsonl"),
        ],
        outputs: vec![],
        needles: needles(&["train.jsonl:2", "question"]),
    }
});

/// `answer --gguf model.gguf` with the llama fixture's tokenizer, on a copy of the tiny q4_0
/// GGUF fixture (tests/fixtures/gguf) changed by `edit`.
fn gguf_case(d: &Path, edit: impl FnOnce(&mut Vec<u8>), needles_: &[&str]) -> Setup {
    write_set(d);
    let mut b = std::fs::read(common::fixture("gguf/llama-q4_0-tied.gguf")).unwrap();
    edit(&mut b);
    std::fs::write(d.join("model.gguf"), b).unwrap();
    let mut setup = answer(d, false, needles_);
    setup.args[2] = runner("llama").join("model").into_os_string();
    setup.args.extend([s("--gguf"), s("model.gguf")]);
    setup
}

/// Where `needle` starts in `b`.
fn find(b: &[u8], needle: &[u8]) -> usize {
    b.windows(needle.len())
        .position(|w| w == needle)
        .expect("needle in the GGUF fixture")
}

/// The byte offset of a tensor's directory fields after its name: (dtype, offset) positions.
fn tensor_fields(b: &[u8], name: &str) -> (usize, usize) {
    let at = find(b, name.as_bytes()) + name.len();
    let dims = u32::from_le_bytes(b[at..at + 4].try_into().unwrap()) as usize;
    let dtype = at + 4 + 8 * dims;
    (dtype, dtype + 4)
}

bad_input!(gguf_not_a_gguf_file, |d| {
    gguf_case(
        d,
        |b| *b = b"not a model".to_vec(),
        &["model.gguf", "not a readable GGUF file"],
    )
});

bad_input!(gguf_truncated_in_the_tensor_data, |d| {
    gguf_case(
        d,
        |b| b.truncate(b.len() * 2 / 3),
        &["model.gguf", "runs past the end of the file", "truncated"],
    )
});

bad_input!(gguf_truncated_in_the_header, |d| {
    gguf_case(
        d,
        |b| b.truncate(300),
        &["model.gguf", "not a readable GGUF file"],
    )
});

bad_input!(gguf_tensor_offset_past_the_end, |d| {
    gguf_case(
        d,
        |b| {
            let (_, off) = tensor_fields(b, "blk.1.ffn_down.weight");
            b[off..off + 8].copy_from_slice(&(1u64 << 40).to_le_bytes());
        },
        &[
            "model.gguf",
            "blk.1.ffn_down.weight",
            "past the end of the file",
        ],
    )
});

bad_input!(gguf_nan_scale_in_a_linear_weight, |d| {
    gguf_case(
        d,
        |b| {
            // The first q4_0 block of the tensor: its f16 scale d (bytes 0..2) set to NaN, so
            // all 32 of its values dequantise to NaN.
            let content = candle_core::quantized::gguf_file::Content::read(
                &mut std::io::Cursor::new(b.clone()),
            )
            .unwrap();
            let info = &content.tensor_infos["blk.1.ffn_down.weight"];
            assert_eq!(info.ggml_dtype, candle_core::quantized::GgmlDType::Q4_0);
            let at = (content.tensor_data_offset + info.offset) as usize;
            b[at..at + 2].copy_from_slice(&0x7E00u16.to_le_bytes());
        },
        &[
            "model.gguf",
            "blk.1.ffn_down.weight",
            "NaN at element [0, 0] once dequantised",
        ],
    )
});

bad_input!(gguf_unsupported_tensor_type, |d| {
    gguf_case(
        d,
        |b| {
            let (dtype, _) = tensor_fields(b, "blk.0.attn_q.weight");
            b[dtype..dtype + 4].copy_from_slice(&23u32.to_le_bytes());
        },
        &["model.gguf", "blk.0.attn_q.weight", "iq4_xs"],
    )
});

bad_input!(gguf_metadata_contradicts_tensor_shapes, |d| {
    gguf_case(
        d,
        |b| {
            let at = find(b, b"llama.feed_forward_length") + "llama.feed_forward_length".len() + 4;
            b[at..at + 4].copy_from_slice(&256u32.to_le_bytes());
        },
        &[
            "model.gguf",
            "blk.0.ffn_gate.weight",
            "contradicts the metadata",
        ],
    )
});

bad_input!(gguf_unsupported_architecture, |d| {
    gguf_case(
        d,
        |b| {
            let at = find(b, b"general.architecture") + "general.architecture".len() + 12;
            b[at..at + 5].copy_from_slice(b"bloom");
        },
        &[
            "model.gguf",
            "general.architecture",
            "`bloom` is not supported",
        ],
    )
});

bad_input!(policy_non_utf8_bytes, |d| {
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&IDS));
    std::fs::write(
        d.join("policy.toml"),
        b"[refusal]\nextra_phrases = [\"n\xe3o posso\"]\n",
    )
    .unwrap();
    grade(
        d,
        &["--policy", "policy.toml"],
        &["policy.toml:2:", "UTF-8"],
    )
});

bad_input!(policy_unknown_key_refused_by_weigh_too, |d| {
    write_set(d);
    write(d, "baseline.grades.jsonl", &grades_for(&IDS));
    write(d, "candidate.grades.jsonl", &grades_for(&IDS));
    write(
        d,
        "policy.toml",
        "[categories]\nrule = \"clear-regression\"\nmax_regresion = 0.1\n",
    );
    weigh(
        d,
        &["--policy", "policy.toml"],
        &["policy.toml:3: field `categories.max_regresion`"],
    )
});

/// As [`gguf_case`] on a copy of another family's GGUF fixture, with that family's tokenizer.
fn family_gguf_case(
    d: &Path,
    file: &str,
    family: &str,
    edit: impl FnOnce(&mut Vec<u8>),
    needles_: &[&str],
) -> Setup {
    let mut setup = gguf_case(d, |_| {}, needles_);
    let mut b = std::fs::read(common::fixture(&format!("gguf/{file}"))).unwrap();
    edit(&mut b);
    std::fs::write(d.join("model.gguf"), b).unwrap();
    setup.args[2] = runner(family).join("model").into_os_string();
    setup
}

bad_input!(gguf_gemma2_softcap_the_reference_ignores, |d| {
    family_gguf_case(
        d,
        "gemma2-q8_0.gguf",
        "gemma2",
        |b| {
            let key = "gemma2.attn_logit_softcapping";
            let at = find(b, key.as_bytes()) + key.len() + 4;
            b[at..at + 4].copy_from_slice(&40f32.to_le_bytes());
        },
        &["model.gguf", "gemma2.attn_logit_softcapping", "is 40", "50"],
    )
});

bad_input!(gguf_phi3_partial_rotary_the_reference_ignores, |d| {
    family_gguf_case(
        d,
        "phi3-q8_0.gguf",
        "phi3",
        |b| {
            let key = "phi3.rope.dimension_count";
            let at = find(b, key.as_bytes()) + key.len() + 4;
            b[at..at + 4].copy_from_slice(&8u32.to_le_bytes());
        },
        &[
            "model.gguf",
            "phi3.rope.dimension_count",
            "rotates 8 of its 16",
        ],
    )
});

// `answer --gguf FILE` with no directory on a file without tokenizer metadata.
bad_input!(gguf_without_tokenizer_and_no_directory, |d| {
    let mut setup = gguf_case(
        d,
        |_| {},
        &[
            "model.gguf",
            "tokenizer.ggml.model",
            "missing",
            "--model DIR",
        ],
    );
    setup.args.drain(1..3);
    setup
});

// `answer --gguf FILE` with no directory on a file whose tokenizer kind is not supported.
bad_input!(gguf_unsupported_tokenizer_kind, |d| {
    write_set(d);
    let mut b = std::fs::read(common::fixture("gguf_tokenizer/qwen2-q5_1-tok.gguf")).unwrap();
    let at = find(&b, b"tokenizer.ggml.model") + "tokenizer.ggml.model".len() + 12;
    b[at..at + 4].copy_from_slice(b"bert");
    std::fs::write(d.join("model.gguf"), b).unwrap();
    let mut setup = answer(
        d,
        false,
        &[
            "model.gguf",
            "tokenizer.ggml.model",
            "`bert` is not supported",
        ],
    );
    setup.args.drain(1..3);
    setup.args.extend([s("--gguf"), s("model.gguf")]);
    setup
});

/// Temporary files the atomic writers leave only when something went wrong.
fn leftovers(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let mut stack = vec![dir.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap().flatten() {
            let p = e.path();
            if p.is_dir() {
                stack.push(p);
            } else if e.file_name().to_string_lossy().starts_with(".liftgate-") {
                out.push(p);
            }
        }
    }
    out
}

/// Runs one case in a fresh temp dir and asserts the bad-input contract: exit 2, a
/// `liftgate: ` message naming every needle, no panic, none of the case's outputs and no
/// temporary file left behind (and, for templates, a stop within the runaway budget). All
/// broken promises are listed together, with stderr.
fn check(name: &str, setup: fn(&Path) -> Setup) {
    let t = Bin::new();
    let setup = setup(t.dir());
    let run = t.run(&setup.args);
    let stderr = &run.stderr;
    // Shown with `--nocapture`, to read every message.
    println!("[{name}] {:.1?}\n{}", run.elapsed, stderr.trim_end());
    let mut problems = Vec::new();
    if run.code != Some(2) {
        problems.push(format!("exit {:?}, expected 2", run.code));
    }
    if stderr.contains("panicked") {
        problems.push("panicked".into());
    }
    if !stderr.starts_with("liftgate: ") {
        problems.push("stderr does not start with \"liftgate: \"".into());
    }
    for n in &setup.needles {
        if !stderr.contains(n.as_str()) {
            problems.push(format!("stderr lacks {n:?}"));
        }
    }
    for o in &setup.outputs {
        if o.exists() {
            problems.push(format!("output {} exists", o.display()));
        }
    }
    for l in leftovers(t.dir()) {
        problems.push(format!("temporary file {} left behind", l.display()));
    }
    // Runaway templates must stop on their own budget; a generous bound, not a benchmark.
    if name.starts_with("template_") && run.elapsed > Duration::from_secs_f64(TEMPLATE_RUNAWAY_SECS)
    {
        problems.push(format!("took {:?}", run.elapsed));
    }
    assert!(
        problems.is_empty(),
        "[{name}]\n  {}\n{}",
        problems.join("\n  "),
        run.describe()
    );
}

/// Every case above is still there (the macro makes the tests; this counts them in the
/// source, so deleting one without lowering [`CASES`] fails).
#[test]
fn catalogue_keeps_every_case() {
    let source = include_str!("bad_inputs.rs");
    let found = source
        .lines()
        .filter(|l| l.starts_with("bad_input!("))
        .count();
    assert_eq!(found, CASES, "bad_input! cases in tests/bad_inputs.rs");
}

/// Where a command's output already exists, a failing run leaves it untouched (never a
/// half-written replacement).
#[test]
fn failing_run_keeps_the_previous_output_whole() {
    let t = Bin::new();
    let d = t.dir();
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&IDS));
    let before = "previous grades, kept byte for byte\n";
    write(d, "grades.jsonl", before);
    write(d, "policy.toml", "[lift]\nmin_ci_low = 7\n");
    t.run([
        "grade",
        "--questions",
        "set.jsonl",
        "--answers",
        "answers.jsonl",
        "--out",
        "grades.jsonl",
        "--policy",
        "policy.toml",
    ])
    .expect_code(2);
    assert_eq!(t.read("grades.jsonl"), before);
    assert!(leftovers(d).is_empty());
}

/// `vet --report DIR` into a directory the user already has: a failure removes what vet wrote
/// and nothing else.
#[test]
fn failing_vet_keeps_the_users_files_in_an_existing_report_directory() {
    let t = Bin::new();
    let d = t.dir();
    let a = adapter_case(d);
    edit_json(&a.join("adapter_config.json"), |c| {
        c["peft_type"] = json!("LOHA")
    });
    write(d, "notes.txt", "ferry rota, keep");
    t.run([
        "vet",
        "--model",
        "model",
        "--adapter",
        "adapter",
        "--questions",
        "set.jsonl",
        "--report",
        ".",
        "--max-new-tokens",
        "4",
    ])
    .expect_code(2);
    assert_eq!(t.read("notes.txt"), "ferry rota, keep");
    assert!(d.join("set.jsonl").is_file() && a.join("adapter_model.safetensors").is_file());
    for f in [
        "baseline.answers.jsonl",
        "baseline.answers.jsonl.run.json",
        "baseline.grades.jsonl",
    ] {
        assert!(!d.join(f).exists(), "{f} left behind");
    }
    assert!(leftovers(d).is_empty());
}

/// After a reference is corrected, `grade --allow-set-change` grades answers made from the
/// earlier version of the set, with a warning; without the flag they are refused (above).
#[test]
fn allow_set_change_grades_answers_from_an_edited_set() {
    let t = Bin::new();
    let d = t.dir();
    write_set(d);
    write(d, "answers.jsonl", &answers_for(&IDS));
    write(
        d,
        "answers.jsonl.run.json",
        &json!({"questions": {"path": "set.jsonl", "fingerprint": "0".repeat(64), "count": 3}})
            .to_string(),
    );
    let setup = grade(d, &["--allow-set-change"], &[]);
    let out = t.run(&setup.args);
    out.expect_success();
    let stderr = &out.stderr;
    assert!(
        stderr.contains("warning") && stderr.contains("different question set"),
        "{stderr}"
    );
    assert_eq!(t.read("grades.jsonl").lines().count(), 3);
}
