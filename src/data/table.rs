//! Reading rows from JSONL or CSV into string-keyed maps with their line numbers.
//! Input: a path, or `-` for standard input. Output: rows, or every unreadable line
//! at once. Knows nothing of what the fields mean.

use std::collections::BTreeMap;
use std::path::Path;

use super::{DataError, LineProblem};

/// One input row: field name to text value, and the 1-based line it came from.
#[derive(Debug, Clone)]
pub struct Row {
    /// 1-based line number in the file.
    pub line: usize,
    /// Field values; JSON numbers are kept as their text.
    pub fields: BTreeMap<String, String>,
}

impl Row {
    /// A required, non-empty field.
    pub fn required(&self, name: &str) -> Result<String, String> {
        match self.fields.get(name) {
            Some(v) if !v.trim().is_empty() => Ok(v.clone()),
            Some(_) => Err(format!("field `{name}` is empty")),
            None => Err(format!("missing field `{name}`")),
        }
    }

    /// An optional field; empty counts as absent.
    pub fn optional(&self, name: &str) -> Option<String> {
        self.fields
            .get(name)
            .filter(|v| !v.trim().is_empty())
            .cloned()
    }
}

/// The path that means standard input.
pub const STDIN: &str = "-";

/// Standard input, read once per process and kept, so that several readers of `-`
/// see the same bytes.
fn stdin_bytes() -> std::io::Result<Vec<u8>> {
    static BYTES: std::sync::OnceLock<Result<Vec<u8>, String>> = std::sync::OnceLock::new();
    BYTES
        .get_or_init(|| {
            let mut buf = Vec::new();
            std::io::Read::read_to_end(&mut std::io::stdin(), &mut buf)
                .map(|_| buf)
                .map_err(|e| e.to_string())
        })
        .clone()
        .map_err(std::io::Error::other)
}

/// Read all rows of a JSONL (`.jsonl`, `.ndjson`, `.json`) or CSV (`.csv`) file, or
/// of standard input for `-` (JSONL when its first non-blank character is `{`, else
/// CSV). Unreadable lines come back as problems beside the good rows, so the caller
/// can add its own checks and report everything in one pass.
pub fn read_rows(
    kind: &'static str,
    path: &Path,
) -> Result<(Vec<Row>, Vec<LineProblem>), DataError> {
    let io = |source| DataError::Io {
        kind,
        path: path.to_path_buf(),
        source,
    };
    if path == Path::new(STDIN) {
        let bytes = stdin_bytes().map_err(io)?;
        let first = bytes.iter().find(|b| !b.is_ascii_whitespace());
        let ext = if first == Some(&b'{') { "jsonl" } else { "csv" };
        return rows_of(kind, path, ext, &bytes);
    }
    let bytes = std::fs::read(path).map_err(io)?;
    parse_rows(kind, path, &bytes)
}

/// Rows of a file's bytes; the path gives the format (its extension) and names the
/// file in messages. A UTF-8 byte-order mark is skipped; lines that are not UTF-8
/// are problems with their line numbers.
pub fn parse_rows(
    kind: &'static str,
    path: &Path,
    bytes: &[u8],
) -> Result<(Vec<Row>, Vec<LineProblem>), DataError> {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .unwrap_or("")
        .to_ascii_lowercase();
    rows_of(kind, path, &ext, bytes)
}

/// Rows of bytes in the format `ext` names (`jsonl`, `ndjson`, `json` or `csv`).
fn rows_of(
    kind: &'static str,
    path: &Path,
    ext: &str,
    bytes: &[u8],
) -> Result<(Vec<Row>, Vec<LineProblem>), DataError> {
    let (text, encoding) = decode_text(bytes);
    let (rows, mut problems) = match ext {
        "jsonl" | "ndjson" | "json" => jsonl_rows(&text),
        "csv" => csv_rows(&text),
        _ => {
            return Err(DataError::UnknownFormat {
                kind,
                path: path.to_path_buf(),
            })
        }
    };
    problems.extend(encoding);
    if rows.is_empty() && problems.is_empty() {
        return Err(DataError::Empty {
            kind,
            path: path.to_path_buf(),
        });
    }
    Ok((rows, problems))
}

/// A file's text without a UTF-8 byte-order mark, and a problem for every line that
/// is not UTF-8 (kept, with replacement characters, so the line count holds) or
/// for a UTF-16 file as a whole.
pub fn decode_text(bytes: &[u8]) -> (std::borrow::Cow<'_, str>, Vec<LineProblem>) {
    let bytes = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    if bytes.starts_with(b"\xFF\xFE") || bytes.starts_with(b"\xFE\xFF") {
        let problem = LineProblem {
            line: 1,
            message:
                "the file is UTF-16 (it starts with a UTF-16 byte-order mark); save it as UTF-8"
                    .into(),
        };
        return (std::borrow::Cow::Borrowed(""), vec![problem]);
    }
    if let Ok(text) = std::str::from_utf8(bytes) {
        return (std::borrow::Cow::Borrowed(text), Vec::new());
    }
    let mut problems = Vec::new();
    for (i, line) in bytes.split(|&b| b == b'\n').enumerate() {
        if let Err(e) = std::str::from_utf8(line) {
            problems.push(LineProblem {
                line: i + 1,
                message: format!(
                    "not UTF-8 (byte {} of the line); save the file as UTF-8",
                    e.valid_up_to() + 1
                ),
            });
        }
    }
    (String::from_utf8_lossy(bytes), problems)
}

/// `Ok(value)` when there are no problems, else every problem sorted by line.
pub fn finish<T>(
    kind: &'static str,
    path: &Path,
    value: T,
    mut problems: Vec<LineProblem>,
) -> Result<T, DataError> {
    if problems.is_empty() {
        return Ok(value);
    }
    problems.sort_by_key(|p| p.line);
    Err(DataError::BadLines {
        kind,
        path: path.to_path_buf(),
        problems,
    })
}

fn jsonl_rows(text: &str) -> (Vec<Row>, Vec<LineProblem>) {
    let mut rows = Vec::new();
    let mut problems = Vec::new();
    for (i, raw) in text.lines().enumerate() {
        let line = i + 1;
        if raw.trim().is_empty() {
            continue;
        }
        match serde_json::from_str::<serde_json::Value>(raw) {
            Ok(serde_json::Value::Object(map)) => {
                let mut fields = BTreeMap::new();
                let mut bad = None;
                for (k, v) in map {
                    let s = match v {
                        serde_json::Value::String(s) => s,
                        serde_json::Value::Number(n) => n.to_string(),
                        serde_json::Value::Bool(b) => b.to_string(),
                        serde_json::Value::Null => String::new(),
                        other => {
                            bad = Some(format!(
                                "field `{k}` must be a string or number, found {}",
                                kind_of(&other)
                            ));
                            continue;
                        }
                    };
                    fields.insert(k, s);
                }
                match bad {
                    Some(message) => problems.push(LineProblem { line, message }),
                    None => rows.push(Row { line, fields }),
                }
            }
            Ok(other) => problems.push(LineProblem {
                line,
                message: format!("expected a JSON object, found {}", kind_of(&other)),
            }),
            Err(e) => problems.push(LineProblem {
                line,
                message: format!("not valid JSON ({e})"),
            }),
        }
    }
    (rows, problems)
}

fn kind_of(v: &serde_json::Value) -> &'static str {
    match v {
        serde_json::Value::Array(_) => "an array",
        serde_json::Value::Object(_) => "an object",
        serde_json::Value::String(_) => "a string",
        serde_json::Value::Number(_) => "a number",
        serde_json::Value::Bool(_) => "a boolean",
        serde_json::Value::Null => "null",
    }
}

fn csv_rows(text: &str) -> (Vec<Row>, Vec<LineProblem>) {
    let mut rows = Vec::new();
    let mut problems = Vec::new();
    let mut reader = csv::ReaderBuilder::new()
        .flexible(false)
        .from_reader(text.as_bytes());
    let headers = match reader.headers() {
        Ok(h) => h.iter().map(|s| s.trim().to_string()).collect::<Vec<_>>(),
        Err(e) => {
            problems.push(LineProblem {
                line: 1,
                message: format!("unreadable header ({e})"),
            });
            return (rows, problems);
        }
    };
    for record in reader.records() {
        match record {
            Ok(rec) => {
                let line = rec.position().map_or(0, |p| p.line() as usize);
                let fields = headers
                    .iter()
                    .cloned()
                    .zip(rec.iter().map(|s| s.to_string()))
                    .collect();
                rows.push(Row { line, fields });
            }
            Err(e) => {
                let line = e.position().map_or(0, |p| p.line() as usize);
                problems.push(LineProblem {
                    line,
                    message: match e.kind() {
                        csv::ErrorKind::UnequalLengths {
                            expected_len, len, ..
                        } => format!("has {len} fields, the header has {expected_len}"),
                        _ => format!("unreadable CSV ({e})"),
                    },
                });
            }
        }
    }
    (rows, problems)
}
