//! Engine stage: the judge's tokenizer. Input: the tokenizer metadata of a GGUF file
//! (`tokenizer.ggml.*`) and text. Output: token ids, and text back from ids.
//! Follows llama.cpp's tokenizer (`llama-vocab.cpp`) so that prompts match what the
//! model saw in training and what the parity fixtures record. Never turns text from a
//! graded answer into a control token: only `encode_trusted`, which is fed template
//! text alone, may produce control tokens.

use std::collections::{BTreeSet, HashMap};
use std::path::PathBuf;

use candle_core::quantized::gguf_file::Value;
use tokenizers::models::bpe::{Vocab, BPE};
use tokenizers::pre_tokenizers::byte_level::ByteLevel;
use tokenizers::pre_tokenizers::sequence::Sequence;
use tokenizers::pre_tokenizers::split::{Split, SplitPattern};
use tokenizers::{
    Model, OffsetReferential, OffsetType, PreTokenizedString, PreTokenizer, PreTokenizerWrapper,
    SplitDelimiterBehavior,
};

use super::chat::Segment;
use super::{EngineError, GgufFile};

/// llama.cpp token types (`tokenizer.ggml.token_type`).
const NORMAL: i32 = 1;
const UNKNOWN: i32 = 2;
const CONTROL: i32 = 3;
const USER_DEFINED: i32 = 4;
const BYTE: i32 = 6;

/// Pre-tokenizer patterns of llama.cpp (`llama-vocab.cpp`, `llama_vocab::impl::load`),
/// with its case-insensitive contractions spelled out so that Unicode case folding
/// (e.g. `ſ` folding to `s`) cannot change the split.
const QWEN2_PATTERN: &str = r"(?:'[sS]|'[tT]|'[rR][eE]|'[vV][eE]|'[mM]|'[lL][lL]|'[dD])|[^\r\n\p{L}\p{N}]?\p{L}+|\p{N}| ?[^\s\p{L}\p{N}]+[\r\n]*|\s*[\r\n]+|\s+(?!\S)|\s+";
const LLAMA3_PATTERN: &str = r"(?:'[sS]|'[tT]|'[rR][eE]|'[vV][eE]|'[mM]|'[lL][lL]|'[dD])|[^\r\n\p{L}\p{N}]?\p{L}+|\p{N}{1,3}| ?[^\s\p{L}\p{N}]+[\r\n]*|\s*[\r\n]+|\s+(?!\S)|\s+";
const GPT2_PATTERN: &str =
    r"'s|'t|'re|'ve|'m|'ll|'d| ?\p{L}+| ?\p{N}+| ?[^\s\p{L}\p{N}]+|\s+(?!\S)";
/// llama.cpp's fallback for byte-level BPE with `tokenizer.ggml.pre = default`: four
/// patterns applied in turn, each splitting the pieces the previous one left.
const DEFAULT_PATTERNS: &[&str] = &[
    r"[\p{P}\$\+<=>\^~\|]+",
    r"'s|'t|'re|'ve|'m|'ll|'d| ?\p{L}+| ?\p{N}+| ?[^\s\p{L}\p{N}]+|\s+(?!\S)",
    r"\p{N}+",
    r"[0-9][0-9][0-9]",
];
/// `tokenizer.ggml.pre` values accepted for byte-level BPE.
const SUPPORTED_PRE: &str = "qwen2, deepseek-r1-qwen, llama3, llama-v3, llama-bpe, gpt-2, default";

/// Texts of end-of-turn tokens that stop generation besides the declared EOS
/// (the same list llama.cpp uses to find end-of-generation tokens).
const END_OF_TURN: &[&str] = &[
    "<|im_end|>",
    "<|endoftext|>",
    "<end_of_turn>",
    "<|eot_id|>",
    "<|eom_id|>",
    "<|end|>",
    "<|end_of_text|>",
];

/// How raw text between special tokens becomes tokens.
enum Family {
    /// Byte-level BPE (`gpt2`): regex split, bytes mapped to printable characters.
    ByteLevel {
        pre: PreTokenizerWrapper,
        byte_of: HashMap<char, u8>,
    },
    /// SentencePiece (`llama`): spaces become U+2581, merges by piece score, unknown
    /// characters fall back to `<0xXX>` byte tokens.
    SentencePiece { add_space_prefix: bool },
}

/// Finds special-token strings in text the way llama.cpp's `tokenizer_st_partition`
/// does: longest token first, each occurrence cut out left to right.
struct SpecialMatcher {
    /// Candidate ids by the first byte of their text.
    by_first_byte: Vec<Vec<u32>>,
}

/// A piece of input after special tokens are cut out.
enum Fragment<'a> {
    Raw(&'a str),
    Token(u32),
}

/// A tokenizer rebuilt from GGUF metadata alone, matching llama.cpp token for token.
pub struct JudgeTokenizer {
    path: PathBuf,
    kind: String,
    model: BPE,
    family: Family,
    tokens: Vec<String>,
    types: Vec<i32>,
    bos: Option<u32>,
    eos: Vec<u32>,
    add_bos: bool,
    /// User-defined tokens only: what llama.cpp matches with `parse_special = false`.
    plain: SpecialMatcher,
    /// Control, user-defined and unknown tokens: `parse_special = true`.
    trusted: SpecialMatcher,
}

impl JudgeTokenizer {
    /// Build the tokenizer described by `tokenizer.ggml.*` in `gguf`.
    pub fn from_gguf(gguf: &GgufFile) -> Result<Self, EngineError> {
        let err = |reason: String| EngineError::Tokenizer {
            path: gguf.path.clone(),
            reason,
        };
        let kind = gguf.string("tokenizer.ggml.model")?;
        let tokens = string_array(gguf, "tokenizer.ggml.tokens")?;
        let types = match gguf.value("tokenizer.ggml.token_type") {
            Some(Value::Array(v)) => v.iter().map(int_of).collect::<Option<Vec<_>>>(),
            _ => Some(vec![NORMAL; tokens.len()]),
        }
        .filter(|t| t.len() == tokens.len())
        .ok_or_else(|| err("`tokenizer.ggml.token_type` is not one integer per token".into()))?;
        // llama.cpp's `token_to_id` map: a repeated text keeps its last id.
        let vocab: Vocab = tokens
            .iter()
            .enumerate()
            .map(|(i, t)| (t.clone(), i as u32))
            .collect();
        let (model, family, default_bos) = match kind.as_str() {
            "gpt2" => {
                let pre_name = gguf
                    .string("tokenizer.ggml.pre")
                    .unwrap_or_else(|_| "default".into());
                let (patterns, ignore_merges, default_bos) = match pre_name.as_str() {
                    "qwen2" | "deepseek-r1-qwen" => (vec![QWEN2_PATTERN], false, false),
                    "llama3" | "llama-v3" | "llama-bpe" => (vec![LLAMA3_PATTERN], true, true),
                    "gpt-2" => (vec![GPT2_PATTERN], false, false),
                    "default" => (DEFAULT_PATTERNS.to_vec(), false, false),
                    other => {
                        return Err(err(format!(
                            "pre-tokenizer `{other}` (`tokenizer.ggml.pre`) is not supported (supported: {SUPPORTED_PRE})"
                        )))
                    }
                };
                let merges = string_array(gguf, "tokenizer.ggml.merges")?
                    .iter()
                    .map(|m| split_merge(m).ok_or_else(|| err(format!("merge `{m}` has no space"))))
                    .collect::<Result<Vec<_>, _>>()?;
                let byte_of: HashMap<char, u8> =
                    byte_chars().into_iter().map(|(b, c)| (c, b)).collect();
                if let Some(c) = byte_of.keys().find(|c| !vocab.contains_key(&c.to_string())) {
                    return Err(err(format!(
                        "byte-level vocabulary lacks the byte character `{c}`"
                    )));
                }
                let model = BPE::builder()
                    .vocab_and_merges(vocab, merges)
                    .ignore_merges(ignore_merges)
                    .build()
                    .map_err(|e| err(format!("cannot build the BPE model: {e}")))?;
                let mut splits = Vec::new();
                for p in patterns {
                    let split = Split::new(
                        SplitPattern::Regex(p.into()),
                        SplitDelimiterBehavior::Isolated,
                        false,
                    )
                    .map_err(|e| err(format!("bad pre-tokenizer pattern: {e}")))?;
                    splits.push(PreTokenizerWrapper::Split(split));
                }
                splits.push(PreTokenizerWrapper::ByteLevel(ByteLevel::new(
                    false, false, false,
                )));
                let pre = PreTokenizerWrapper::Sequence(Sequence::new(splits));
                (model, Family::ByteLevel { pre, byte_of }, default_bos)
            }
            "llama" => {
                let scores = match gguf.value("tokenizer.ggml.scores") {
                    Some(Value::Array(v)) => v.iter().map(float_of).collect::<Option<Vec<_>>>(),
                    _ => None,
                }
                .filter(|s| s.len() == tokens.len())
                .ok_or_else(|| err("`tokenizer.ggml.scores` is not one float per token".into()))?;
                if let Some(b) = (0..=255u8).find(|b| !vocab.contains_key(&byte_token(*b))) {
                    return Err(err(format!(
                        "vocabulary lacks the byte token `{}`",
                        byte_token(b)
                    )));
                }
                let merges = score_merges(&tokens, &types, &scores, &vocab);
                let model = BPE::builder()
                    .vocab_and_merges(vocab, merges)
                    .byte_fallback(true)
                    .build()
                    .map_err(|e| err(format!("cannot build the SentencePiece model: {e}")))?;
                let add_space_prefix = gguf
                    .boolean("tokenizer.ggml.add_space_prefix")
                    .unwrap_or(true);
                (model, Family::SentencePiece { add_space_prefix }, true)
            }
            other => {
                return Err(err(format!(
                    "tokenizer model `{other}` is not supported (supported: gpt2, llama)"
                )))
            }
        };
        let id = |key: &str| {
            gguf.uint(key)
                .ok()
                .map(|v| v as u32)
                .filter(|v| (*v as usize) < tokens.len())
        };
        let mut eos: Vec<u32> = ["tokenizer.ggml.eos_token_id", "tokenizer.ggml.eot_token_id"]
            .iter()
            .filter_map(|k| id(k))
            .collect();
        for (i, t) in tokens.iter().enumerate() {
            if types[i] == CONTROL
                && END_OF_TURN.contains(&t.as_str())
                && !eos.contains(&(i as u32))
            {
                eos.push(i as u32);
            }
        }
        let special = |wanted: &[i32]| SpecialMatcher::new(&tokens, &types, wanted);
        Ok(JudgeTokenizer {
            path: gguf.path.clone(),
            bos: id("tokenizer.ggml.bos_token_id"),
            add_bos: gguf
                .boolean("tokenizer.ggml.add_bos_token")
                .unwrap_or(default_bos),
            eos,
            plain: special(&[USER_DEFINED]),
            trusted: special(&[CONTROL, USER_DEFINED, UNKNOWN]),
            kind,
            model,
            family,
            tokens,
            types,
        })
    }

    /// Encode untrusted text: control-token strings stay plain text; no BOS.
    pub fn encode_plain(&self, text: &str) -> Result<Vec<u32>, EngineError> {
        self.encode_with(&self.plain, text)
    }

    /// Encode template text: control-token strings become control tokens; no BOS.
    /// Only for text the chat template produced, never for answer text.
    pub fn encode_trusted(&self, text: &str) -> Result<Vec<u32>, EngineError> {
        self.encode_with(&self.trusted, text)
    }

    /// Encode a rendered prompt: `Control` spans as trusted, `Content` spans as plain.
    /// Each segment boundary is also a token boundary. BOS first when `add_bos` and the
    /// model asks for one.
    pub fn encode_segments(
        &self,
        segments: &[Segment],
        add_bos: bool,
    ) -> Result<Vec<u32>, EngineError> {
        let mut ids = Vec::new();
        if add_bos && self.add_bos {
            ids.extend(self.bos);
        }
        for segment in segments {
            match segment {
                Segment::Control(s) => ids.extend(self.encode_trusted(s)?),
                Segment::Content(s) => ids.extend(self.encode_plain(s)?),
            }
        }
        Ok(ids)
    }

    fn encode_with(&self, matcher: &SpecialMatcher, text: &str) -> Result<Vec<u32>, EngineError> {
        let mut ids = Vec::new();
        // llama.cpp prefixes a space to raw text at the start and after a special token.
        let mut after_special = true;
        for fragment in matcher.partition(text, &self.tokens) {
            match fragment {
                Fragment::Token(id) => {
                    ids.push(id);
                    after_special = true;
                }
                Fragment::Raw(raw) => {
                    self.encode_raw(raw, after_special, &mut ids)?;
                    after_special = false;
                }
            }
        }
        Ok(ids)
    }

    fn encode_raw(
        &self,
        raw: &str,
        after_special: bool,
        ids: &mut Vec<u32>,
    ) -> Result<(), EngineError> {
        let fail = |e: tokenizers::Error| EngineError::Tokenizer {
            path: self.path.clone(),
            reason: format!("cannot encode text: {e}"),
        };
        match &self.family {
            Family::ByteLevel { pre, .. } => {
                let mut pretok = PreTokenizedString::from(raw);
                pre.pre_tokenize(&mut pretok).map_err(fail)?;
                for (word, _, _) in pretok.get_splits(OffsetReferential::Original, OffsetType::Byte)
                {
                    ids.extend(
                        self.model
                            .tokenize(word)
                            .map_err(fail)?
                            .iter()
                            .map(|t| t.id),
                    );
                }
            }
            Family::SentencePiece { add_space_prefix } => {
                let prefix = if *add_space_prefix && after_special {
                    " "
                } else {
                    ""
                };
                let escaped = format!("{prefix}{raw}").replace(' ', "\u{2581}");
                ids.extend(
                    self.model
                        .tokenize(&escaped)
                        .map_err(fail)?
                        .iter()
                        .map(|t| t.id),
                );
            }
        }
        Ok(())
    }

    /// Text of `ids`, as llama.cpp detokenises without special tokens: control and
    /// unused tokens are left out; invalid UTF-8 becomes U+FFFD.
    pub fn decode(&self, ids: &[u32]) -> Result<String, EngineError> {
        let mut bytes = Vec::new();
        for &id in ids {
            let i = id as usize;
            let text = self.tokens.get(i).ok_or_else(|| {
                EngineError::Invalid(format!(
                    "token id {id} is outside the vocabulary of {} tokens",
                    self.tokens.len()
                ))
            })?;
            bytes.extend(self.piece_bytes(i, text));
        }
        Ok(String::from_utf8_lossy(&bytes).into_owned())
    }

    /// The bytes one token stands for in decoded text.
    fn piece_bytes(&self, i: usize, text: &str) -> Vec<u8> {
        match (self.types[i], &self.family) {
            (USER_DEFINED, _) => text.as_bytes().to_vec(),
            (NORMAL, Family::ByteLevel { byte_of, .. }) => text
                .chars()
                .filter_map(|c| byte_of.get(&c).copied())
                .collect(),
            (NORMAL, Family::SentencePiece { .. }) => text.replace('\u{2581}', " ").into_bytes(),
            (BYTE, _) => parse_byte_token(text).map(|b| vec![b]).unwrap_or_default(),
            _ => Vec::new(),
        }
    }

    /// A readable form of one token for listings: control tokens show their text,
    /// partial UTF-8 shows as `<0xXX>` bytes.
    pub fn piece(&self, id: u32) -> String {
        let i = id as usize;
        let Some(text) = self.tokens.get(i) else {
            return format!("<invalid id {id}>");
        };
        if matches!(self.types[i], NORMAL | USER_DEFINED) {
            let bytes = self.piece_bytes(i, text);
            match String::from_utf8(bytes) {
                Ok(s) => s,
                Err(e) => e.as_bytes().iter().map(|b| byte_token(*b)).collect(),
            }
        } else {
            text.clone()
        }
    }

    /// Beginning-of-sequence id, if the model declares one.
    pub fn bos(&self) -> Option<u32> {
        self.bos
    }

    /// Ids that end a turn: the declared EOS/EOT and end-of-turn control tokens.
    pub fn eos(&self) -> Vec<u32> {
        self.eos.clone()
    }

    /// Whether the model expects BOS at the start of a prompt.
    pub fn add_bos(&self) -> bool {
        self.add_bos && self.bos.is_some()
    }

    /// Number of entries in `tokenizer.ggml.tokens`.
    pub fn vocab_size(&self) -> usize {
        self.tokens.len()
    }

    /// Tokenizer family as `tokenizer.ggml.model` names it (`gpt2` or `llama`).
    pub fn kind(&self) -> &str {
        &self.kind
    }

    /// Id of the token whose stored text is exactly `piece`.
    pub fn token_id(&self, piece: &str) -> Option<u32> {
        self.model.token_to_id(piece)
    }
}

impl SpecialMatcher {
    fn new(tokens: &[String], types: &[i32], wanted: &[i32]) -> Self {
        let mut by_first_byte = vec![Vec::new(); 256];
        for (i, t) in tokens.iter().enumerate() {
            if wanted.contains(&types[i]) {
                if let Some(&b) = t.as_bytes().first() {
                    by_first_byte[b as usize].push(i as u32);
                }
            }
        }
        SpecialMatcher { by_first_byte }
    }

    /// Cut `text` at special-token strings, longest token first (ties: lower id), as
    /// llama.cpp's `tokenizer_st_partition` does.
    fn partition<'a>(&self, text: &'a str, tokens: &[String]) -> Vec<Fragment<'a>> {
        let bytes = text.as_bytes();
        let mut present = BTreeSet::new();
        for start in 0..bytes.len() {
            for &id in &self.by_first_byte[bytes[start] as usize] {
                if bytes[start..].starts_with(tokens[id as usize].as_bytes()) {
                    present.insert((usize::MAX - tokens[id as usize].len(), id));
                }
            }
        }
        let mut fragments = vec![Fragment::Raw(text)];
        for (_, id) in present {
            let needle = tokens[id as usize].as_str();
            let mut next = Vec::with_capacity(fragments.len());
            for fragment in fragments {
                let Fragment::Raw(mut rest) = fragment else {
                    next.push(fragment);
                    continue;
                };
                while let Some(at) = rest.find(needle) {
                    if at > 0 {
                        next.push(Fragment::Raw(&rest[..at]));
                    }
                    next.push(Fragment::Token(id));
                    rest = &rest[at + needle.len()..];
                }
                if !rest.is_empty() {
                    next.push(Fragment::Raw(rest));
                }
            }
            fragments = next;
        }
        fragments
    }
}

/// SentencePiece BPE merges recovered from piece scores: every way to write a piece
/// as two shorter pieces, the highest-scoring result first. llama.cpp's SPM tokenizer
/// (`llm_tokenizer_spm_session`) merges the adjacent pair whose concatenation is the
/// best-scoring piece, so these ranks reproduce it. Control pieces are never targets,
/// so plain text cannot merge into a control token.
fn score_merges(
    tokens: &[String],
    types: &[i32],
    scores: &[f32],
    vocab: &Vocab,
) -> Vec<(String, String)> {
    let mut ranked: Vec<(f32, usize, &str, &str)> = Vec::new();
    for (i, t) in tokens.iter().enumerate() {
        if !matches!(types[i], NORMAL | USER_DEFINED) || vocab.get(t) != Some(&(i as u32)) {
            continue;
        }
        for (at, _) in t.char_indices().skip(1) {
            let (left, right) = t.split_at(at);
            if vocab.contains_key(left) && vocab.contains_key(right) {
                ranked.push((scores[i], i, left, right));
            }
        }
    }
    ranked.sort_by(|a, b| b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)));
    ranked
        .into_iter()
        .map(|(_, _, l, r)| (l.to_string(), r.to_string()))
        .collect()
}

/// GPT-2's byte-to-character table (Radford et al., 2019): printable bytes map to
/// themselves, the rest to code points from U+0100 upward.
fn byte_chars() -> Vec<(u8, char)> {
    let mut out = Vec::with_capacity(256);
    let mut next = 0u32;
    for b in 0..=255u8 {
        let printable = matches!(b, b'!'..=b'~' | 0xA1..=0xAC | 0xAE..=0xFF);
        let c = if printable {
            b as u32
        } else {
            next += 1;
            255 + next
        };
        out.push((
            b,
            char::from_u32(c).expect("code points below U+0200 are valid"),
        ));
    }
    out
}

fn byte_token(b: u8) -> String {
    format!("<0x{b:02X}>")
}

fn parse_byte_token(text: &str) -> Option<u8> {
    let hex = text.strip_prefix("<0x")?.strip_suffix('>')?;
    u8::from_str_radix(hex, 16).ok()
}

/// llama.cpp splits a merge line at the first space after its first byte.
fn split_merge(line: &str) -> Option<(String, String)> {
    let first = line.chars().next()?.len_utf8();
    let at = line[first..].find(' ')? + first;
    Some((line[..at].to_string(), line[at + 1..].to_string()))
}

fn string_array(gguf: &GgufFile, key: &str) -> Result<Vec<String>, EngineError> {
    let missing = || EngineError::Metadata {
        path: gguf.path.clone(),
        key: key.to_string(),
        expected: "an array of strings".into(),
    };
    match gguf.value(key) {
        Some(Value::Array(items)) => items
            .iter()
            .map(|v| match v {
                Value::String(s) => Ok(s.clone()),
                _ => Err(missing()),
            })
            .collect(),
        _ => Err(missing()),
    }
}

fn int_of(v: &Value) -> Option<i32> {
    match v {
        Value::I32(x) => Some(*x),
        Value::U32(x) => i32::try_from(*x).ok(),
        Value::I8(x) => Some(*x as i32),
        Value::U8(x) => Some(*x as i32),
        Value::I16(x) => Some(*x as i32),
        Value::U16(x) => Some(*x as i32),
        Value::I64(x) => i32::try_from(*x).ok(),
        Value::U64(x) => i32::try_from(*x).ok(),
        _ => None,
    }
}

fn float_of(v: &Value) -> Option<f32> {
    match v {
        Value::F32(x) => Some(*x),
        Value::F64(x) => Some(*x as f32),
        _ => None,
    }
}
