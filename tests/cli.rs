//! Command-line tests: drive the `assize` binary as a user would and check outputs,
//! error messages and exit codes. Model facts are checked against the published model
//! configurations (named per test).

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use clap::CommandFactory;

fn bin() -> Command {
    let mut c = Command::new(env!("CARGO_BIN_EXE_assize"));
    c.current_dir(env!("CARGO_MANIFEST_DIR"));
    c.env_remove("HF_HUB_OFFLINE");
    c
}

fn run(args: &[&str]) -> Output {
    bin().args(args).output().expect("binary runs")
}

fn stderr(o: &Output) -> String {
    String::from_utf8_lossy(&o.stderr).into_owned()
}

fn info_json(file: &str) -> serde_json::Value {
    let path = common::real_model(file);
    let o = run(&[
        "model",
        "info",
        path.to_str().expect("utf-8 path"),
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    serde_json::from_slice(&o.stdout).expect("one JSON document")
}

/// Clap's own consistency check of every argument definition.
#[test]
fn clap_definitions_are_consistent() {
    assize::cli::Cli::command().debug_assert();
}

/// The top-level help lists every subcommand; reviewed snapshot in tests/fixtures/help.txt.
#[test]
fn top_level_help_matches_snapshot() {
    let o = run(&["--help"]);
    assert!(o.status.success());
    let got = String::from_utf8_lossy(&o.stdout).replace("\r\n", "\n");
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/help.txt");
    if std::env::var_os("ASSIZE_UPDATE_SNAPSHOTS").is_some() {
        std::fs::write(&path, &got).expect("write snapshot");
    }
    let want = std::fs::read_to_string(&path)
        .expect("snapshot exists (ASSIZE_UPDATE_SNAPSHOTS=1 writes it)");
    assert_eq!(got, want);
}

/// Qwen2.5-Coder-1.5B-Instruct published configuration (model card config.json):
/// 28 layers, hidden 1536, 12 attention heads, 2 KV heads, vocabulary 151936.
#[test]
fn default_judge_info_matches_published_config() {
    let v = info_json("qwen2.5-coder-1.5b-instruct-q4_k_m.gguf");
    assert_eq!(v["architecture"], "qwen2");
    assert_eq!(v["layers"], 28);
    assert_eq!(v["hidden_size"], 1536);
    assert_eq!(v["heads"], 12);
    assert_eq!(v["kv_heads"], 2);
    assert_eq!(v["vocab_size"], 151936);
    assert_eq!(v["chat_template"], true);
    assert_eq!(v["tokenizer"], "gpt2");
    assert_eq!(
        v["sha256"],
        "cc324af070c2ecbfd324a30884d2f951a7ff756aba85cb811a6ec436933bb046"
    );
    let params = v["parameters"].as_u64().expect("count");
    assert!((1_400_000_000..1_800_000_000).contains(&params), "{params}");
}

/// Qwen2.5-Coder-0.5B-Instruct published configuration: 24 layers, hidden 896, 14
/// attention heads, 2 KV heads, vocabulary 151936.
#[test]
fn small_judge_info_matches_published_config() {
    let v = info_json("qwen2.5-coder-0.5b-instruct-q5_0.gguf");
    assert_eq!(v["layers"], 24);
    assert_eq!(v["hidden_size"], 896);
    assert_eq!(v["heads"], 14);
    assert_eq!(v["kv_heads"], 2);
    assert_eq!(v["vocab_size"], 151936);
}

/// Gemma 3 270M configuration, values from memory of its published config.json
/// (18 layers, hidden 640, 4 heads, 1 KV head, feed-forward 2048, context 32768,
/// vocabulary 262144) and confirmed by the GGUF file's own metadata; SentencePiece
/// (`llama`) tokenizer; a base model without chat template.
#[test]
fn gemma_info_matches_published_config() {
    let v = info_json("gemma-3-270m-q4_k_m.gguf");
    assert_eq!(v["architecture"], "gemma3");
    assert_eq!(v["layers"], 18);
    assert_eq!(v["hidden_size"], 640);
    assert_eq!(v["heads"], 4);
    assert_eq!(v["kv_heads"], 1);
    assert_eq!(v["feed_forward"], 2048);
    assert_eq!(v["context_length"], 32768);
    assert_eq!(v["vocab_size"], 262144);
    assert_eq!(v["tokenizer"], "llama");
    assert_eq!(v["chat_template"], false);
}

/// A truncated download keeps its header but loses tensor data: a clear error, exit 2.
#[test]
fn truncated_model_is_a_clear_error() {
    let src = common::real_model("gemma-3-270m-q4_k_m.gguf");
    let dir = tempfile::tempdir().expect("tmp");
    let cut = dir.path().join("cut.gguf");
    let bytes = std::fs::read(&src).expect("read");
    std::fs::write(&cut, &bytes[..bytes.len() / 2]).expect("write");
    let o = run(&["model", "info", cut.to_str().expect("utf-8")]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("is truncated"), "{e}");
    assert!(e.contains("fix: the download was interrupted"), "{e}");
    assert!(!e.contains("panicked"), "{e}");
}

/// A file that is not GGUF at all, and a header cut in the middle.
#[test]
fn non_gguf_and_cut_header_are_clear_errors() {
    let dir = tempfile::tempdir().expect("tmp");
    let txt = dir.path().join("notes.gguf");
    std::fs::write(&txt, "these are notes, not a model").expect("write");
    let o = run(&["model", "info", txt.to_str().expect("utf-8")]);
    assert_eq!(o.status.code(), Some(2));
    assert!(
        stderr(&o).contains("does not start with the GGUF magic bytes"),
        "{}",
        stderr(&o)
    );
    let src = common::real_model("gemma-3-270m-q4_k_m.gguf");
    let head = dir.path().join("head.gguf");
    let bytes = std::fs::read(&src).expect("read");
    std::fs::write(&head, &bytes[..4096]).expect("write");
    let o = run(&["model", "info", head.to_str().expect("utf-8")]);
    assert_eq!(o.status.code(), Some(2));
    assert!(stderr(&o).contains("is damaged"), "{}", stderr(&o));
    assert!(stderr(&o).contains("fetch it again"), "{}", stderr(&o));
}

fn hub_cache_with_tiny(dir: &Path) -> PathBuf {
    let cache = dir.join("hub");
    let repo = cache.join("models--example-org--tiny-judge");
    let snap = repo.join("snapshots/0123456789abcdef");
    std::fs::create_dir_all(&snap).expect("mkdir");
    std::fs::create_dir_all(repo.join("refs")).expect("mkdir");
    std::fs::write(repo.join("refs/main"), "0123456789abcdef").expect("ref");
    let model = common::tiny_gguf::Tiny::new("llama").write(dir);
    std::fs::copy(&model, snap.join("tiny.gguf")).expect("copy");
    cache
}

/// Offline fetch from a hub cache in the usual layout (models--OWNER--NAME/refs,
/// snapshots) built by the test: the file is found without any network.
#[test]
fn offline_fetch_finds_a_cached_file() {
    let dir = tempfile::tempdir().expect("tmp");
    let cache = hub_cache_with_tiny(dir.path());
    let o = bin()
        .args([
            "model",
            "fetch",
            "example-org/tiny-judge",
            "tiny.gguf",
            "--json",
        ])
        .env("HF_HUB_CACHE", &cache)
        .env("HF_HUB_OFFLINE", "1")
        .output()
        .expect("runs");
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    assert_eq!(v["from_cache"], true);
    assert!(v["path"]
        .as_str()
        .expect("path")
        .ends_with("snapshots/0123456789abcdef/tiny.gguf"));
    // --cache-dir works the same as the environment variable.
    let o = run(&[
        "model",
        "fetch",
        "example-org/tiny-judge",
        "tiny.gguf",
        "--offline",
        "--cache-dir",
        cache.to_str().expect("utf-8"),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
}

/// A file missing from an offline cache is a clear error naming file, repo and cache.
#[test]
fn offline_fetch_of_a_missing_file_is_a_clear_error() {
    let dir = tempfile::tempdir().expect("tmp");
    let cache = hub_cache_with_tiny(dir.path());
    let o = bin()
        .args([
            "model",
            "fetch",
            "example-org/tiny-judge",
            "other.gguf",
            "--offline",
        ])
        .env("HF_HUB_CACHE", &cache)
        .output()
        .expect("runs");
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("`other.gguf` of `example-org/tiny-judge`"),
        "{e}"
    );
    assert!(e.contains("offline mode is on"), "{e}");
    assert!(e.contains("fix:"), "{e}");
}

/// Every malformed answers line is reported in one pass, with the file and a fix.
#[test]
fn malformed_answers_lines_are_all_reported() {
    let dir = tempfile::tempdir().expect("tmp");
    let f = dir.path().join("bad.jsonl");
    std::fs::write(
        &f,
        "{\"question_id\":\"q1\",\"system\":\"s\",\"question\":\"Q\",\"answer\":\"A\"}\n{\"question_id\":\"q2\",\"system\":\"s\"}\n[1,2]\n",
    )
    .expect("write");
    let o = run(&[
        "grade",
        "--answers",
        f.to_str().expect("utf-8"),
        "--model",
        "missing.gguf",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("bad.jsonl"), "{e}");
    assert!(
        e.contains("line 2: missing field `question`; missing field `answer`"),
        "{e}"
    );
    assert!(
        e.contains("line 3: expected a JSON object, found an array"),
        "{e}"
    );
    assert!(e.contains("fix:"), "{e}");
}

/// A bad rubric is rejected with its line numbers before any model is loaded.
#[test]
fn bad_rubric_is_reported_with_lines() {
    let dir = tempfile::tempdir().expect("tmp");
    let r = dir.path().join("r.toml");
    std::fs::write(
        &r,
        "name = \"x\"\n[[criterion]]\nkey = \"a\"\nquestion = \"Q\"\nscale = \"1-12\"\n",
    )
    .expect("write");
    let o = run(&["rubric", "check", r.to_str().expect("utf-8")]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("line 5: criterion `a`: unknown scale `1-12`"),
        "{e}"
    );
    assert!(e.contains("fix:"), "{e}");
}

/// An unknown criterion asked for on the command line names the known ones.
#[test]
fn unknown_criterion_names_the_known_ones() {
    let o = run(&[
        "grade",
        "--answers",
        "demo-data/answers.jsonl",
        "--criteria",
        "politeness",
        "--model",
        "missing.gguf",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(e.contains("no criterion `politeness`"), "{e}");
    assert!(e.contains("correctness"), "{e}");
}

/// Human labels that name an unknown criterion or an off-scale score are reported.
#[test]
fn bad_labels_are_reported_per_line() {
    let dir = tempfile::tempdir().expect("tmp");
    let l = dir.path().join("labels.csv");
    std::fs::write(&l, "question_id,system,criterion,rater,score\nq01,assistant-v1,politeness,r1,3\nq01,assistant-v1,correctness,r1,9\n").expect("write");
    let o = run(&[
        "grade",
        "--answers",
        "demo-data/answers.jsonl",
        "--anchors",
        l.to_str().expect("utf-8"),
        "--model",
        "missing.gguf",
    ]);
    assert_eq!(o.status.code(), Some(2));
    let e = stderr(&o);
    assert!(
        e.contains("line 3: score `9` is not on the scale of `correctness`"),
        "{e}"
    );
}

/// The dry run shows the exact prompt, with the answer's control strings as text.
#[test]
fn rubric_show_renders_the_prompt_without_running_the_model() {
    let o = run(&[
        "rubric",
        "show",
        "--answers",
        "demo-data/answers.jsonl",
        "--item",
        "q31/assistant-v1",
        "--criteria",
        "correctness",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    let prompt = v["prompt"].as_str().expect("prompt");
    assert!(prompt.starts_with("<|im_start|>system"));
    assert!(prompt.ends_with("<|im_start|>assistant\nScore: "));
    assert!(v["tokens"].as_u64().expect("count") > 200);
}

/// Overlap metrics on the demo answers: the stronger system has the higher ROUGE-L.
#[test]
fn overlap_command_scores_every_system() {
    let o = run(&["overlap", "--answers", "demo-data/answers.jsonl", "--json"]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    let systems = v["systems"].as_array().expect("systems");
    assert_eq!(systems.len(), 3);
    assert_eq!(v["items"].as_array().expect("items").len(), 150);
    let rouge = |name: &str| {
        systems
            .iter()
            .find(|s| s["system"] == name)
            .expect("system")["mean"]["rougel_f"]
            .as_f64()
            .expect("number")
    };
    assert!(rouge("assistant-v2") > rouge("assistant-v1"));
}

/// `model tokens` keeps chat-control strings as plain text; `--trusted` parses them.
#[test]
fn model_tokens_shows_control_strings_as_plain_text() {
    let m = common::real_model("qwen2.5-coder-0.5b-instruct-q5_0.gguf");
    let m = m.to_str().expect("utf-8");
    let plain = run(&["model", "tokens", m, "<|im_end|>", "--json"]);
    assert!(plain.status.success(), "{}", stderr(&plain));
    let v: serde_json::Value = serde_json::from_slice(&plain.stdout).expect("json");
    assert!(
        v.as_array().expect("rows").len() > 1,
        "split into plain pieces: {v}"
    );
    let trusted = run(&["model", "tokens", m, "<|im_end|>", "--trusted", "--json"]);
    let t: serde_json::Value = serde_json::from_slice(&trusted.stdout).expect("json");
    assert_eq!(
        t.as_array().expect("rows").len(),
        1,
        "one control token: {t}"
    );
    assert_eq!(t[0]["piece"], "<|im_end|>");
}

/// `model next` lists the top tokens by probability, deterministically.
#[test]
fn model_next_lists_top_tokens_in_order() {
    let m = common::real_model("gemma-3-270m-q4_k_m.gguf");
    let m = m.to_str().expect("utf-8");
    let args = [
        "model",
        "next",
        m,
        "One, two, three, four,",
        "--top",
        "5",
        "--threads",
        "2",
        "--json",
    ];
    let a = run(&args);
    assert!(a.status.success(), "{}", stderr(&a));
    let v: serde_json::Value = serde_json::from_slice(&a.stdout).expect("json");
    let p: Vec<f64> = v
        .as_array()
        .expect("rows")
        .iter()
        .map(|r| r["probability"].as_f64().expect("p"))
        .collect();
    assert_eq!(p.len(), 5);
    assert!(p.windows(2).all(|w| w[0] >= w[1]), "{p:?}");
    assert!(p.iter().sum::<f64>() <= 1.0 + 1e-9);
    assert!(
        v[0]["piece"].as_str().expect("piece").contains("five"),
        "a counting prompt continues with five: {v}"
    );
    let b = run(&args);
    assert_eq!(a.stdout, b.stdout, "same input, same output");
}

/// `estimate` on a fixed grading run: every labelled system and criterion gets a
/// judge-only, human-only, PPI and PPI++ estimate; the held-out human mean equals the
/// mean of the consensus labels computed here from the labels file (lower median).
#[test]
fn estimate_reports_corrected_means_per_system_and_criterion() {
    let o = run(&[
        "estimate",
        "--grades",
        "tests/fixtures/report/before",
        "--labels",
        "tests/fixtures/report/labels.csv",
        "--label-share",
        "0.5",
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    let rows = v["rows"].as_array().expect("rows");
    assert_eq!(rows.len(), 6, "3 systems x 2 labelled criteria");
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/report/labels.csv"),
    )
    .expect("labels");
    for row in rows {
        let (sys, crit) = (
            row["system"].as_str().expect("s"),
            row["criterion"].as_str().expect("c"),
        );
        let mut per_item: std::collections::BTreeMap<String, Vec<u32>> = Default::default();
        for line in text.lines().skip(1) {
            let f: Vec<&str> = line.split(',').collect();
            if f[1] == sys && f[2] == crit {
                per_item
                    .entry(f[0].to_string())
                    .or_default()
                    .push(f[4].parse().expect("score"));
            }
        }
        let consensus: Vec<f64> = per_item
            .values_mut()
            .map(|v| {
                v.sort();
                v[(v.len() - 1) / 2] as f64
            })
            .collect();
        let mean = consensus.iter().sum::<f64>() / consensus.len() as f64;
        assert!(
            (row["held_out_human_mean"].as_f64().expect("mean") - mean).abs() < 1e-12,
            "{row}"
        );
        assert_eq!(
            row["n_labelled"].as_u64().expect("n") + row["n_unlabelled"].as_u64().expect("n"),
            4
        );
        let ppi = &row["ppi_plus_plus"];
        assert!(ppi["ci_low"].as_f64().expect("lo") <= ppi["estimate"].as_f64().expect("est"));
        assert!(
            ppi["lambda"].as_f64().expect("lambda") >= 0.0
                && ppi["lambda"].as_f64().expect("lambda") <= 1.0
        );
    }
}

/// `vet` prints trust cards for a finished run; `--min-kappa` above what the judge
/// reaches fails the gate with exit code 1, and a reachable bar passes with 0.
#[test]
fn vet_gate_fails_with_exit_code_one() {
    let base = [
        "vet",
        "--grades",
        "tests/fixtures/report/before",
        "--labels",
        "tests/fixtures/report/labels.csv",
        "--resamples",
        "200",
    ];
    let ok = run(&base);
    assert!(ok.status.success(), "{}", stderr(&ok));
    let text = String::from_utf8_lossy(&ok.stdout);
    assert!(text.contains("trust card for `correctness`"), "{text}");
    // The same table as CSV: one row per criterion and variant.
    let dir = tempfile::tempdir().expect("tmp");
    let csv = dir.path().join("vet.csv");
    let mut with_csv = base.to_vec();
    with_csv.extend(["--csv", csv.to_str().expect("utf-8")]);
    assert!(run(&with_csv).status.success());
    let table = std::fs::read_to_string(&csv).expect("CSV written");
    assert!(table.starts_with("criterion,variant,n_items,kappa_quadratic"), "{table}");
    assert!(table.lines().any(|l| l.starts_with("correctness,expected score,")), "{table}");
    let mut strict = base.to_vec();
    strict.extend(["--min-kappa", "0.99"]);
    let o = run(&strict);
    assert_eq!(o.status.code(), Some(1), "{}", stderr(&o));
    assert!(stderr(&o).contains("gate failed"), "{}", stderr(&o));
    let mut lenient = base.to_vec();
    lenient.extend(["--min-kappa=-1", "--json"]);
    let o = run(&lenient);
    assert_eq!(o.status.code(), Some(0), "{}", stderr(&o));
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).expect("json");
    assert_eq!(v["gate_failures"], serde_json::json!([]));
}

/// A calibration saved by `vet` applies to the run it was fitted on and is refused,
/// with the difference named, for a run made with another judge model.
#[test]
fn saved_calibration_applies_to_its_setup_and_refuses_another_judge() {
    let fx = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/report");
    let tmp = tempfile::tempdir().expect("tmp");
    let cal = tmp.path().join("cal.json");
    let before = fx.join("before");
    let labels = fx.join("labels.csv");
    let o = run(&[
        "vet",
        "--grades",
        before.to_str().unwrap(),
        "--labels",
        labels.to_str().unwrap(),
        "--calibrate",
        "--folds",
        "2",
        "--resamples",
        "50",
        "--save-calibration",
        cal.to_str().unwrap(),
        "--json",
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    let out = tmp.path().join("calibrated");
    let o = run(&[
        "calibrate",
        "--mapping",
        cal.to_str().unwrap(),
        "--grades",
        before.to_str().unwrap(),
        "--out-dir",
        out.to_str().unwrap(),
    ]);
    assert!(o.status.success(), "{}", stderr(&o));
    assert!(out.join("grades.jsonl").exists());
    let other = tmp.path().join("other");
    std::fs::create_dir_all(&other).unwrap();
    std::fs::copy(before.join("grades.jsonl"), other.join("grades.jsonl")).unwrap();
    let m = std::fs::read_to_string(before.join("manifest.json")).unwrap();
    let m = m.replace(&"0".repeat(64), &"1".repeat(64));
    std::fs::write(other.join("manifest.json"), m).unwrap();
    let o = run(&[
        "calibrate",
        "--mapping",
        cal.to_str().unwrap(),
        "--grades",
        other.to_str().unwrap(),
        "--out-dir",
        tmp.path().join("refused").to_str().unwrap(),
    ]);
    assert_eq!(o.status.code(), Some(2), "{}", stderr(&o));
    assert!(
        stderr(&o).contains("model sha256 `111111111111`"),
        "{}",
        stderr(&o)
    );
}
