//! Engine stage: chat formatting. Input: the model's `tokenizer.chat_template` (Jinja)
//! and a conversation. Output: the prompt string Python's jinja2 would render, and the
//! same prompt cut into template spans and message-content spans. Never lets message
//! content pass as template text: the tokenizer encodes content spans as plain text,
//! so an answer that writes `<|im_start|>` cannot open a turn.
//!
//! Base models without a template get a plain format with no control tokens:
//! `System:\n{content}\n\nUser:\n{content}\n\nAssistant:\n{content}\n\n`, ending in
//! `Assistant:\n` when a generation prompt is asked for. Plain text has no control
//! tokens, so content lines that begin with a role label (`User:`, any case) are
//! quoted with `| ` and answer text cannot forge a turn.
//!
//! BOS: templates often start with `{{ bos_token }}`, while the tokenizer adds BOS
//! itself when `tokenizer.ggml.add_bos_token` is true. `render` keeps the string as
//! jinja2 renders it; `render_segments` drops one leading BOS string in that case so
//! that `encode_segments(.., true)` yields exactly one BOS.

use std::path::PathBuf;

use candle_core::quantized::gguf_file::Value;
use minijinja::{context, Environment, Error, ErrorKind};
use serde::Serialize;

use super::{EngineError, GgufFile};

/// Who speaks a message.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Role {
    /// Instructions for the whole conversation.
    System,
    /// The human side: for a judge, the grading form.
    User,
    /// The model side.
    Assistant,
}

/// One turn of a conversation.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct ChatMessage {
    /// Who speaks.
    pub role: Role,
    /// What is said; always encoded as plain text.
    pub content: String,
}

/// A span of a rendered prompt.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Segment {
    /// Text the template wrote: may contain control-token strings.
    Control(String),
    /// Text copied from a message: never becomes control tokens.
    Content(String),
}

/// How a model wants a conversation laid out.
pub struct ChatFormat {
    path: PathBuf,
    /// The compiled template, absent for base models.
    env: Option<Environment<'static>>,
    bos_token: String,
    eos_token: String,
    /// Whether the tokenizer adds BOS itself, so a rendered leading BOS must go.
    tokenizer_adds_bos: bool,
}

const TEMPLATE_NAME: &str = "chat_template";

/// Private-use code points (Unicode plane 15) fence the stand-in for message `i`;
/// they are unlikely in templates and answers, and a clash is detected, not trusted.
fn sentinel(i: usize) -> String {
    format!("\u{F0A5A}{i}\u{F0A5B}")
}

impl ChatFormat {
    /// Read and compile `tokenizer.chat_template`; a model without one gets the plain format.
    pub fn from_gguf(gguf: &GgufFile) -> Result<Self, EngineError> {
        let token_text = |key: &str| -> String {
            let id = gguf.uint(key).ok();
            match (id, gguf.value("tokenizer.ggml.tokens")) {
                (Some(id), Some(Value::Array(tokens))) => match tokens.get(id as usize) {
                    Some(Value::String(s)) => s.clone(),
                    _ => String::new(),
                },
                _ => String::new(),
            }
        };
        let default_add_bos = gguf
            .string("tokenizer.ggml.model")
            .map(|m| m == "llama")
            .unwrap_or(false);
        let env = match gguf.string("tokenizer.chat_template") {
            Ok(source) => Some(compile(source).map_err(|source| EngineError::Template {
                path: gguf.path.clone(),
                source,
            })?),
            Err(_) => None,
        };
        Ok(ChatFormat {
            path: gguf.path.clone(),
            env,
            bos_token: token_text("tokenizer.ggml.bos_token_id"),
            eos_token: token_text("tokenizer.ggml.eos_token_id"),
            tokenizer_adds_bos: gguf
                .boolean("tokenizer.ggml.add_bos_token")
                .unwrap_or(default_add_bos)
                && gguf.uint("tokenizer.ggml.bos_token_id").is_ok(),
        })
    }

    /// Whether the model ships a chat template (instruction-tuned) or not (base model).
    pub fn has_template(&self) -> bool {
        self.env.is_some()
    }

    /// The prompt string, exactly as jinja2 renders the template (or the plain format).
    pub fn render(
        &self,
        msgs: &[ChatMessage],
        add_generation_prompt: bool,
    ) -> Result<String, EngineError> {
        match &self.env {
            Some(env) => self.render_template(env, msgs, add_generation_prompt),
            None => Ok(plain_segments(msgs, add_generation_prompt)
                .into_iter()
                .map(|s| match s {
                    Segment::Control(t) | Segment::Content(t) => t,
                })
                .collect()),
        }
    }

    /// The prompt cut into template text and message contents, without a leading BOS
    /// string when the tokenizer adds BOS itself.
    pub fn render_segments(
        &self,
        msgs: &[ChatMessage],
        add_generation_prompt: bool,
    ) -> Result<Vec<Segment>, EngineError> {
        let Some(env) = &self.env else {
            return Ok(plain_segments(msgs, add_generation_prompt));
        };
        let expected = self.render_template(env, msgs, add_generation_prompt)?;
        let stand_ins: Vec<ChatMessage> = msgs
            .iter()
            .enumerate()
            .map(|(i, m)| ChatMessage {
                role: m.role,
                content: sentinel(i),
            })
            .collect();
        let skeleton = self.render_template(env, &stand_ins, add_generation_prompt)?;
        // A template may trim contents (`| trim`); try verbatim contents first, then trimmed.
        let mut segments = None;
        for trimmed in [false, true] {
            let candidate = fill(&skeleton, msgs, trimmed).map_err(|e| self.error(e))?;
            let joined: String = candidate
                .iter()
                .map(|s| match s {
                    Segment::Control(t) | Segment::Content(t) => t.as_str(),
                })
                .collect();
            if joined == expected {
                segments = Some(candidate);
                break;
            }
        }
        let mut segments = segments.ok_or_else(|| {
            self.error("the template transforms message contents, so they cannot be kept apart from template text".into())
        })?;
        if self.tokenizer_adds_bos && !self.bos_token.is_empty() {
            if let Some(Segment::Control(first)) = segments.first_mut() {
                if let Some(rest) = first.strip_prefix(self.bos_token.as_str()) {
                    *first = rest.to_string();
                }
            }
            segments.retain(|s| !matches!(s, Segment::Control(t) if t.is_empty()));
        }
        Ok(segments)
    }

    fn render_template(
        &self,
        env: &Environment<'static>,
        msgs: &[ChatMessage],
        add_generation_prompt: bool,
    ) -> Result<String, EngineError> {
        let template = env
            .get_template(TEMPLATE_NAME)
            .map_err(|e| self.template_error(e))?;
        template
            .render(context! {
                messages => msgs,
                add_generation_prompt => add_generation_prompt,
                bos_token => self.bos_token,
                eos_token => self.eos_token,
            })
            .map_err(|e| self.template_error(e))
    }

    fn template_error(&self, source: Error) -> EngineError {
        EngineError::Template {
            path: self.path.clone(),
            source,
        }
    }

    fn error(&self, reason: String) -> EngineError {
        self.template_error(Error::new(ErrorKind::InvalidOperation, reason))
    }
}

/// Compile a template with the settings the reference Python chat-template renderer gives
/// jinja2 (`trim_blocks`, `lstrip_blocks`, `raise_exception`) and Python string methods.
fn compile(source: String) -> Result<Environment<'static>, Error> {
    let mut env = Environment::new();
    env.set_trim_blocks(true);
    env.set_lstrip_blocks(true);
    minijinja_contrib::add_to_environment(&mut env);
    env.set_unknown_method_callback(minijinja_contrib::pycompat::unknown_method_callback);
    env.add_function("raise_exception", |msg: String| -> Result<String, Error> {
        Err(Error::new(ErrorKind::InvalidOperation, msg))
    });
    env.add_template_owned(TEMPLATE_NAME, source)?;
    Ok(env)
}

/// Replace each sentinel in `skeleton` by its message content; each must occur once.
fn fill(skeleton: &str, msgs: &[ChatMessage], trimmed: bool) -> Result<Vec<Segment>, String> {
    let mut found: Vec<(usize, usize)> = Vec::with_capacity(msgs.len());
    for i in 0..msgs.len() {
        let mark = sentinel(i);
        let hits: Vec<usize> = skeleton.match_indices(&mark).map(|(at, _)| at).collect();
        if hits.len() != 1 {
            return Err(format!(
                "message {} appears {} times in the rendered template, expected once",
                i + 1,
                hits.len()
            ));
        }
        found.push((hits[0], i));
    }
    found.sort_unstable();
    let mut segments = Vec::new();
    let mut at = 0;
    for (start, i) in found {
        if start > at {
            segments.push(Segment::Control(skeleton[at..start].to_string()));
        }
        let content = &msgs[i].content;
        let content = if trimmed {
            content.trim()
        } else {
            content.as_str()
        };
        if !content.is_empty() {
            segments.push(Segment::Content(content.to_string()));
        }
        at = start + sentinel(i).len();
    }
    if at < skeleton.len() {
        segments.push(Segment::Control(skeleton[at..].to_string()));
    }
    Ok(segments)
}

/// Content with every line that starts like a plain-format turn quoted with `| `.
fn quote_role_lines(content: &str) -> String {
    let forged = |line: &str| {
        let l = line.trim_start().to_ascii_lowercase();
        ["system:", "user:", "assistant:"]
            .iter()
            .any(|r| l.starts_with(r))
    };
    if !content.lines().any(forged) {
        return content.to_string();
    }
    content
        .split('\n')
        .map(|line| {
            if forged(line) {
                format!("| {line}")
            } else {
                line.to_string()
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// The documented plain format for base models.
fn plain_segments(msgs: &[ChatMessage], add_generation_prompt: bool) -> Vec<Segment> {
    let mut segments = Vec::new();
    let mut control = String::new();
    for m in msgs {
        let label = match m.role {
            Role::System => "System",
            Role::User => "User",
            Role::Assistant => "Assistant",
        };
        control.push_str(label);
        control.push_str(":\n");
        if !m.content.is_empty() {
            segments.push(Segment::Control(std::mem::take(&mut control)));
            segments.push(Segment::Content(quote_role_lines(&m.content)));
        }
        control.push_str("\n\n");
    }
    if add_generation_prompt {
        control.push_str("Assistant:\n");
    }
    if !control.is_empty() {
        segments.push(Segment::Control(control));
    }
    segments
}
