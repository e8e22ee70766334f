//! Chat-template parity: assize's `ChatFormat` (minijinja) against Python jinja2 on the
//! judge models' own templates and on invented templates in common styles. Input: the
//! GGUF files (`ASSIZE_MODELS_DIR`, else `models/`) and tests/fixtures/chat/*.json from
//! scripts/make-chat-fixtures.py. Output: pass/fail. Never skips a missing model.

use std::path::{Path, PathBuf};

use assize::engine::chat::{ChatFormat, ChatMessage, Role, Segment};
use assize::engine::tokenizer::JudgeTokenizer;
use assize::engine::GgufFile;
use candle_core::quantized::gguf_file::Value;
use serde::Deserialize;

const QWEN_1_5B: &str = "qwen2.5-coder-1.5b-instruct-q4_k_m";
const QWEN_0_5B: &str = "qwen2.5-coder-0.5b-instruct-q5_0";
const GEMMA: &str = "gemma-3-270m-q4_k_m";

#[derive(Deserialize)]
struct ChatFixture {
    reference: Reference,
    template: bool,
    cases: Vec<ChatCase>,
}

#[derive(Deserialize)]
struct SyntheticFixture {
    reference: Reference,
    templates: Vec<SyntheticTemplate>,
}

#[derive(Deserialize)]
struct SyntheticTemplate {
    name: String,
    source: String,
    cases: Vec<ChatCase>,
}

#[derive(Deserialize)]
struct Reference {
    version: String,
}

#[derive(Deserialize)]
struct ChatCase {
    name: String,
    messages: Vec<Message>,
    add_generation_prompt: bool,
    rendered: String,
}

#[derive(Deserialize)]
struct Message {
    role: String,
    content: String,
}

fn model_path(stem: &str) -> PathBuf {
    let dir = std::env::var_os("ASSIZE_MODELS_DIR")
        .map(PathBuf::from)
        .unwrap_or_else(|| Path::new(env!("CARGO_MANIFEST_DIR")).join("models"));
    let path = dir.join(format!("{stem}.gguf"));
    assert!(
        path.exists(),
        "model `{}` is missing: run `scripts/fetch-models --all` (or set ASSIZE_MODELS_DIR)",
        path.display()
    );
    path
}

fn fixture<T: serde::de::DeserializeOwned>(name: &str) -> T {
    let tests = Path::new(env!("CARGO_MANIFEST_DIR")).join(file!());
    let path = tests
        .parent()
        .expect("test file has a folder")
        .join("fixtures/chat")
        .join(format!("{name}.json"));
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("cannot read `{}`: {e}", path.display()));
    serde_json::from_str(&text).unwrap_or_else(|e| panic!("bad fixture `{}`: {e}", path.display()))
}

fn messages(case: &ChatCase) -> Vec<ChatMessage> {
    case.messages
        .iter()
        .map(|m| ChatMessage {
            role: match m.role.as_str() {
                "system" => Role::System,
                "user" => Role::User,
                "assistant" => Role::Assistant,
                other => panic!("unknown role `{other}`"),
            },
            content: m.content.clone(),
        })
        .collect()
}

fn text(segments: &[Segment]) -> String {
    segments
        .iter()
        .map(|s| match s {
            Segment::Control(t) | Segment::Content(t) => t.as_str(),
        })
        .collect()
}

fn contents(segments: &[Segment]) -> Vec<&str> {
    segments
        .iter()
        .filter_map(|s| match s {
            Segment::Content(t) => Some(t.as_str()),
            Segment::Control(_) => None,
        })
        .collect()
}

/// Renderings equal jinja2's, and the segments rejoin to the same string with each
/// non-empty message content (trimmed where the template trims) as one Content span.
fn check_cases(format: &ChatFormat, cases: &[ChatCase], bos: Option<&str>, version: &str) {
    assert!(!cases.is_empty());
    for case in cases {
        let msgs = messages(case);
        let rendered = format
            .render(&msgs, case.add_generation_prompt)
            .expect("renders");
        assert_eq!(
            rendered, case.rendered,
            "`{}` differs from jinja2 {version}",
            case.name
        );
        let segments = format
            .render_segments(&msgs, case.add_generation_prompt)
            .expect("segments");
        let expected = match bos {
            Some(b) => case
                .rendered
                .strip_prefix(b)
                .expect("rendering starts with BOS"),
            None => case.rendered.as_str(),
        };
        assert_eq!(
            text(&segments),
            expected,
            "`{}`: segments do not rejoin",
            case.name
        );
        let wanted: Vec<&str> = msgs.iter().map(|m| m.content.trim()).collect();
        let got: Vec<&str> = contents(&segments).into_iter().map(str::trim).collect();
        assert_eq!(
            got.len(),
            wanted.len(),
            "`{}`: one Content span per message",
            case.name
        );
        for w in &wanted {
            assert!(
                got.contains(w),
                "`{}`: content {w:?} is not a Content span",
                case.name
            );
        }
    }
}

fn check_model(stem: &str) {
    let fx: ChatFixture = fixture(stem);
    let format =
        ChatFormat::from_gguf(&GgufFile::open(&model_path(stem)).expect("opens")).expect("format");
    assert_eq!(format.has_template(), fx.template);
    check_cases(&format, &fx.cases, None, &fx.reference.version);
}

/// Python jinja2 (version in the fixture), `apply_chat_template` settings, on the
/// Qwen2.5-Coder 1.5B template: identical strings and clean segments.
#[test]
fn qwen_1_5b_template_matches_jinja2() {
    check_model(QWEN_1_5B);
}

/// Python jinja2 (version in the fixture) on the Qwen2.5-Coder 0.5B template.
#[test]
fn qwen_0_5b_template_matches_jinja2() {
    check_model(QWEN_0_5B);
}

/// The Gemma 3 270M base model has no template: the plain format applies, matching the
/// Python mirror of it in scripts/make-chat-fixtures.py, with no control text at all.
#[test]
fn gemma_base_model_uses_plain_format_without_control_tokens() {
    check_model(GEMMA);
    let gguf = GgufFile::open(&model_path(GEMMA)).expect("opens");
    let format = ChatFormat::from_gguf(&gguf).expect("format");
    let tok = JudgeTokenizer::from_gguf(&gguf).expect("tokenizer");
    let msgs = [ChatMessage {
        role: Role::User,
        content: "hi".into(),
    }];
    let segments = format.render_segments(&msgs, true).expect("segments");
    let ids = tok.encode_segments(&segments, true).expect("encodes");
    assert_eq!(ids.iter().filter(|&&id| Some(id) == tok.bos()).count(), 1);
    assert!(ids.iter().all(|id| !tok.eos().contains(id)));
    assert_eq!(
        tok.decode(&ids).expect("decodes"),
        "User:\nhi\n\nAssistant:\n"
    );
}

fn gemma_with_template(source: &str) -> GgufFile {
    let mut gguf = GgufFile::open(&model_path(GEMMA)).expect("opens");
    gguf.content.metadata.insert(
        "tokenizer.chat_template".into(),
        Value::String(source.into()),
    );
    gguf
}

/// Python jinja2 (version in the fixture) on invented templates that use a leading
/// `bos_token`, a system prompt folded into the first turn, `| trim`, `raise_exception`
/// and Python string methods (`upper`, `title`, `strip`, `replace`): identical strings;
/// segments drop the leading BOS because the Gemma tokenizer adds BOS itself.
#[test]
fn invented_templates_match_jinja2_and_drop_leading_bos() {
    let fx: SyntheticFixture = fixture("synthetic-templates");
    assert!(fx.templates.len() >= 2);
    for t in &fx.templates {
        let gguf = gemma_with_template(&t.source);
        let format = ChatFormat::from_gguf(&gguf).unwrap_or_else(|e| panic!("`{}`: {e}", t.name));
        check_cases(&format, &t.cases, Some("<bos>"), &fx.reference.version);
        let tok = JudgeTokenizer::from_gguf(&gguf).expect("tokenizer");
        let msgs = messages(&t.cases[0]);
        let ids = tok
            .encode_segments(
                &format.render_segments(&msgs, true).expect("segments"),
                true,
            )
            .expect("encodes");
        assert_eq!(
            ids.iter().filter(|&&id| Some(id) == tok.bos()).count(),
            1,
            "`{}`: exactly one BOS",
            t.name
        );
        assert_eq!(ids.first().copied(), tok.bos());
    }
}

/// jinja2's `raise_exception` convention (chat templates of published models) surfaces as a
/// template error carrying the message.
#[test]
fn raise_exception_in_template_becomes_template_error() {
    let gguf = gemma_with_template("{% if messages[0].role == 'system' %}{{ raise_exception('system role not supported') }}{% endif %}ok");
    let format = ChatFormat::from_gguf(&gguf).expect("compiles");
    let msgs = [ChatMessage {
        role: Role::System,
        content: "x".into(),
    }];
    let err = format.render(&msgs, true).expect_err("must fail");
    let chain = format!("{err} / {:?}", std::error::Error::source(&err));
    assert!(chain.contains("system role not supported"), "{chain}");
    assert_eq!(
        format
            .render(
                &[ChatMessage {
                    role: Role::User,
                    content: "x".into()
                }],
                true
            )
            .expect("renders"),
        "ok"
    );
}

/// A template that copies a message twice cannot be split safely: refused, not guessed.
#[test]
fn template_repeating_content_is_refused_for_segments() {
    let gguf =
        gemma_with_template("{% for m in messages %}{{ m.content }}|{{ m.content }}{% endfor %}");
    let format = ChatFormat::from_gguf(&gguf).expect("compiles");
    let msgs = [ChatMessage {
        role: Role::User,
        content: "x".into(),
    }];
    assert_eq!(format.render(&msgs, false).expect("renders"), "x|x");
    assert!(format.render_segments(&msgs, false).is_err());
}
