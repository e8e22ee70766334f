//! Rubric stage, checking: a rubric file's text into its name, description and checked
//! criteria, or every problem in it with its line, in one pass. Input: the text.
//! Output: `Checked` or the problems, in line order. TOML syntax errors come first in
//! the making: after each one the broken line (or, for a broken table header, the
//! whole table) is blanked and the text parsed again, up to [`MAX_SYNTAX_ERRORS`];
//! then unknown keys, wrong types, missing fields, scales, needs, scale-point
//! descriptions and duplicate keys are checked on what parsed. A field missing from a
//! table with a blanked line is not reported: it may sit on that line. Never reads
//! files.

use std::collections::HashSet;
use std::ops::Range;

use toml_edit::{ImDocument, Item, Table, TableLike};

use super::{Criterion, Need, RubricProblem, Scale};

/// Syntax errors collected before the rest of the file is left unchecked.
pub const MAX_SYNTAX_ERRORS: usize = 20;

const TOP_KEYS: [&str; 3] = ["name", "description", "criterion"];
const CRITERION_KEYS: [&str; 7] = ["key", "title", "question", "scale", "needs", "steps", "points"];

/// A rubric's parts, checked.
pub struct Checked {
    /// Rubric name.
    pub name: String,
    /// One-line description.
    pub description: String,
    /// Criteria in file order.
    pub criteria: Vec<Criterion>,
}

/// Check rubric text; every problem is returned, in line order.
pub fn check(text: &str) -> Result<Checked, Vec<RubricProblem>> {
    let (doc, blanked, mut problems) = parse_recovering(text);
    let mut walk = Walk {
        text: doc.raw().to_string(),
        blanked,
        problems: Vec::new(),
        keys: HashSet::new(),
    };
    let checked = walk.rubric(doc.as_table());
    problems.extend(walk.problems);
    problems.sort_by_key(|p| p.line);
    match checked {
        Some(c) if problems.is_empty() => Ok(c),
        _ => Err(problems),
    }
}

/// 1-based line of a byte offset (counted in bytes, so any offset is safe).
fn line_of(text: &str, offset: usize) -> usize {
    let bytes = &text.as_bytes()[..offset.min(text.len())];
    bytes.iter().filter(|&&b| b == b'\n').count() + 1
}

fn is_header(line: &str) -> bool {
    line.trim_start().starts_with('[')
}

/// Parse, blanking each line a syntax error points at (or the table whose header is
/// broken) and parsing again. Returns the document of what parsed, the blanked line
/// numbers and one problem per syntax error.
fn parse_recovering(text: &str) -> (ImDocument<String>, Vec<usize>, Vec<RubricProblem>) {
    let mut lines: Vec<String> = text.split('\n').map(str::to_string).collect();
    let mut blanked = Vec::new();
    let mut problems = Vec::new();
    loop {
        let joined = lines.join("\n");
        let err = match ImDocument::parse(joined.clone()) {
            Ok(doc) => return (doc, blanked, problems),
            Err(e) => e,
        };
        let line = err.span().map_or(1, |s| line_of(&joined, s.start));
        let what = err.message().lines().next().unwrap_or("").trim().to_string();
        problems.push(RubricProblem {
            line,
            message: format!(
                "TOML syntax: {what} (write `key = value` with text in double quotes, and tables as `[[criterion]]` or `[criterion.points]`)"
            ),
        });
        let more = problems.len() < MAX_SYNTAX_ERRORS && blank(&mut lines, line, &mut blanked);
        if !more {
            problems.push(RubricProblem {
                line,
                message: "the lines after this one were not checked: fix the syntax errors above first".into(),
            });
            let empty = ImDocument::parse(String::new()).expect("an empty document parses");
            return (empty, blanked, problems);
        }
    }
}

/// Blank line `line` (1-based), or from a broken table header to the next header.
/// False when there is nothing left to blank there.
fn blank(lines: &mut [String], line: usize, blanked: &mut Vec<usize>) -> bool {
    let start = line.saturating_sub(1);
    if start >= lines.len() || lines[start].trim().is_empty() {
        return false;
    }
    let end = if is_header(&lines[start]) {
        (start + 1..lines.len())
            .find(|&i| is_header(&lines[i]))
            .unwrap_or(lines.len())
    } else {
        start + 1
    };
    for (i, l) in lines.iter_mut().enumerate().take(end).skip(start) {
        l.clear();
        blanked.push(i + 1);
    }
    true
}

/// The semantic checks over the parsed document.
struct Walk {
    text: String,
    blanked: Vec<usize>,
    problems: Vec<RubricProblem>,
    keys: HashSet<String>,
}

impl Walk {
    fn bad(&mut self, line: usize, message: String) {
        self.problems.push(RubricProblem { line, message });
    }

    fn line(&self, span: Option<Range<usize>>, fallback: usize) -> usize {
        span.map_or(fallback, |s| line_of(&self.text, s.start))
    }

    /// Line of a key in a table (the key itself, else its value).
    fn key_line(&self, t: &dyn TableLike, key: &str, fallback: usize) -> usize {
        t.get_key_value(key).map_or(fallback, |(k, v)| {
            self.line(k.span().or_else(|| v.span()), fallback)
        })
    }

    /// True when a line was blanked after a syntax error between `line` and the next
    /// `[[criterion]]` header (for the top level, the next header of any table).
    fn damaged(&self, line: usize) -> bool {
        let top = line == 1;
        let next = self
            .text
            .split('\n')
            .enumerate()
            .skip(line)
            .find(|(_, l)| if top { is_header(l) } else { l.trim_start().starts_with("[[") })
            .map_or(usize::MAX, |(i, _)| i + 1);
        self.blanked.iter().any(|&b| b >= line && b < next)
    }

    fn unknown_keys(&mut self, t: &dyn TableLike, known: &[&str], line: usize, what: &str) {
        let unknown: Vec<String> = t
            .iter()
            .map(|(k, _)| k.to_string())
            .filter(|k| !known.contains(&k.as_str()))
            .collect();
        for k in unknown {
            let at = self.key_line(t, &k, line);
            let allowed: Vec<String> = known.iter().map(|k| format!("`{k}`")).collect();
            self.bad(at, format!("unknown key `{k}` in {what} (known: {})", allowed.join(", ")));
        }
    }

    /// A text field: `None` when absent (reported when `required` and the table is
    /// intact) or not text (reported).
    fn text_field(&mut self, t: &dyn TableLike, key: &str, line: usize, required: bool, what: &str) -> Option<String> {
        let Some(item) = t.get(key) else {
            if required && !self.damaged(line) {
                self.bad(line, format!("{what} has no `{key}`"));
            }
            return None;
        };
        match item.as_str() {
            Some(s) => Some(s.to_string()),
            None => {
                let at = self.key_line(t, key, line);
                self.bad(at, format!("{what}: `{key}` must be text in double quotes, not {}", item.type_name()));
                None
            }
        }
    }

    /// A list of texts, each with its line; absent is empty.
    fn text_list(&mut self, t: &dyn TableLike, key: &str, line: usize, what: &str) -> Vec<(String, usize)> {
        let Some(item) = t.get(key) else {
            return Vec::new();
        };
        let at = self.key_line(t, key, line);
        let Some(array) = item.as_array() else {
            self.bad(at, format!("{what}: `{key}` must be a list of texts, such as `[\"a\", \"b\"]`"));
            return Vec::new();
        };
        let mut out = Vec::new();
        for v in array.iter() {
            match v.as_str() {
                Some(s) => out.push((s.to_string(), self.line(v.span(), at))),
                None => self.bad(at, format!("{what}: every entry of `{key}` must be text in double quotes")),
            }
        }
        out
    }

    fn rubric(&mut self, root: &Table) -> Option<Checked> {
        self.unknown_keys(root, &TOP_KEYS, 1, "the rubric");
        let top = "the rubric";
        let name = self.text_field(root, "name", 1, true, top);
        let description = self.text_field(root, "description", 1, false, top).unwrap_or_default();
        let mut criteria = Vec::new();
        match root.get("criterion") {
            None if self.blanked.is_empty() => self.bad(1, "no `[[criterion]]` tables".into()),
            None => {}
            Some(item) => match item.as_array_of_tables() {
                Some(tables) => {
                    for t in tables.iter() {
                        let line = self.line(t.span(), 1);
                        criteria.push(self.criterion(t, line));
                    }
                }
                None => {
                    let at = self.key_line(root, "criterion", 1);
                    self.bad(at, "`criterion` must be `[[criterion]]` tables, one per criterion".into());
                }
            },
        }
        let criteria: Option<Vec<Criterion>> = criteria.into_iter().collect();
        Some(Checked {
            name: name?,
            description,
            criteria: criteria?,
        })
    }

    fn criterion(&mut self, t: &Table, line: usize) -> Option<Criterion> {
        self.unknown_keys(t, &CRITERION_KEYS, line, "a `[[criterion]]` table");
        let key = self.text_field(t, "key", line, true, "a `[[criterion]]` table");
        let what = key.as_deref().map_or_else(|| "criterion".to_string(), |k| format!("criterion `{k}`"));
        if let Some(k) = &key {
            let at = self.key_line(t, "key", line);
            if k.trim().is_empty() || !k.chars().all(|ch| ch.is_ascii_alphanumeric() || ch == '-' || ch == '_') {
                self.bad(at, format!("criterion key `{k}` must be letters, digits, `-` or `_`"));
            }
            if !self.keys.insert(k.clone()) {
                self.bad(at, format!("criterion key `{k}` appears twice (give each criterion its own key)"));
            }
        }
        let title = self.text_field(t, "title", line, false, &what);
        let question = self.text_field(t, "question", line, true, &what);
        if question.as_deref().is_some_and(|q| q.trim().is_empty()) {
            let at = self.key_line(t, "question", line);
            self.bad(at, format!("{what}: empty `question`"));
        }
        let scale = self.scale(t, line, &what);
        let needs = self.needs(t, line, &what);
        let steps = self.text_list(t, "steps", line, &what).into_iter().map(|s| s.0).collect();
        let points = scale.and_then(|s| self.points(t, line, &what, s));
        Some(Criterion {
            title: title.unwrap_or_else(|| key.clone().unwrap_or_default()),
            key: key?,
            question: question?,
            scale: scale?,
            needs,
            steps,
            points: points?,
        })
    }

    fn scale(&mut self, t: &Table, line: usize, what: &str) -> Option<Scale> {
        let text = self.text_field(t, "scale", line, true, what)?;
        let parsed = Scale::parse(&text);
        if parsed.is_none() {
            let at = self.key_line(t, "scale", line);
            self.bad(at, format!("{what}: unknown scale `{text}` (use `A-B` with whole numbers and 2 to 11 points, such as `1-5` or `0-10`, or `yes-no`)"));
        }
        parsed
    }

    fn needs(&mut self, t: &Table, line: usize, what: &str) -> Vec<Need> {
        let mut needs = Vec::new();
        for (n, at) in self.text_list(t, "needs", line, what) {
            match n.as_str() {
                "reference" => needs.push(Need::Reference),
                "context" => needs.push(Need::Context),
                other => self.bad(at, format!("{what}: unknown need `{other}` (use `reference` or `context`)")),
            }
        }
        needs
    }

    /// One description per scale point, in scale order.
    fn points(&mut self, t: &Table, line: usize, what: &str, scale: Scale) -> Option<Vec<(String, String)>> {
        let at = self.key_line(t, "points", line);
        let table: Option<&dyn TableLike> = match t.get("points") {
            None => None,
            Some(item) => match item.as_table_like() {
                Some(p) => Some(p),
                None => {
                    self.bad(at, format!("{what}: `points` must be a table of texts, such as `[criterion.points]`"));
                    return None;
                }
            },
        };
        let labels = scale.labels();
        let mut out = Vec::new();
        let mut complete = true;
        for l in &labels {
            match table.and_then(|p| p.get(l)).map(Item::as_str) {
                Some(Some(text)) => out.push((l.clone(), text.to_string())),
                Some(None) => {
                    complete = false;
                    let line_of_point = table.map_or(at, |p| self.key_line(p, l, at));
                    self.bad(line_of_point, format!("{what}: the description of point `{l}` must be text in double quotes"));
                }
                None => {
                    complete = false;
                    if !self.damaged(line) {
                        self.bad(line, format!("{what}: no description for scale point `{l}`"));
                    }
                }
            }
        }
        for (k, _) in table.map(|p| p.iter().collect::<Vec<_>>()).unwrap_or_default() {
            if !labels.iter().any(|l| l == k) {
                let line_of_point = table.map_or(at, |p| self.key_line(p, k, at));
                self.bad(line_of_point, format!("{what}: point `{k}` is not on scale `{}`", scale.name()));
            }
        }
        complete.then_some(out)
    }
}
