//! Seeded mutation fuzzing of every parser that reads user files, on stable Rust.
//! Input: the committed corpus in `tests/fuzz-corpus/<parser>/` (valid files).
//! Each round picks a corpus file, applies a few seeded mutations (bit flips,
//! interesting integers, inserted delimiters and cut UTF-8, deleted, repeated or
//! spliced ranges, truncation) and parses the result; a panic anywhere is a failure
//! and its input is saved under `target/fuzz-failures/`. For GGUF, an input the
//! validator accepts is also given to candle's reader, which must not panic either.
//! Bounded: `ASSIZE_FUZZ_INPUTS` per parser (default 20,000), or as many as fit in
//! `ASSIZE_FUZZ_SECONDS` per parser when that is set. Prints inputs tried per parser.

use std::io::Cursor;
use std::panic::{catch_unwind, AssertUnwindSafe};
use std::path::{Path, PathBuf};
use std::time::{Duration, Instant};

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

/// One parser under test: its corpus folder, and a function that must not panic
/// (returning whether the input was accepted).
struct Target {
    name: &'static str,
    parse: fn(&[u8]) -> bool,
}

fn gguf(bytes: &[u8]) -> bool {
    assize::engine::gguf_check::check(Cursor::new(bytes), bytes.len() as u64).is_ok()
        && candle_core::quantized::gguf_file::Content::read(&mut Cursor::new(bytes)).is_ok()
}

fn answers_jsonl(bytes: &[u8]) -> bool {
    assize::data::parse_answers(Path::new("answers.jsonl"), bytes).is_ok()
}

fn answers_csv(bytes: &[u8]) -> bool {
    assize::data::parse_answers(Path::new("answers.csv"), bytes).is_ok()
}

fn labels(bytes: &[u8]) -> bool {
    assize::data::parse_labels(Path::new("labels.csv"), bytes).is_ok()
}

fn rubric(bytes: &[u8]) -> bool {
    assize::rubric::parse_rubric_bytes(Path::new("rubric.toml"), bytes).is_ok()
}

fn results(bytes: &[u8]) -> bool {
    let Ok(loaded) = assize::store::parse_lines(Path::new("grades.jsonl"), bytes) else {
        return false;
    };
    loaded.lines.into_iter().all(|l| {
        serde_json::from_value::<assize::judge::GradeRecord>(l.value.clone()).is_ok()
            || serde_json::from_value::<assize::judge::PairRecord>(l.value).is_ok()
    })
}

const TARGETS: &[Target] = &[
    Target { name: "gguf", parse: gguf },
    Target { name: "answers-jsonl", parse: answers_jsonl },
    Target { name: "answers-csv", parse: answers_csv },
    Target { name: "labels", parse: labels },
    Target { name: "rubric", parse: rubric },
    Target { name: "results", parse: results },
];

/// Byte strings that matter to these formats.
const TOKENS: &[&[u8]] = &[
    b"\n", b"\r\n", b"\"", b",", b"{", b"}", b"[", b"]", b":", b"=", b"#", b"'''", b"\"\"\"",
    b"\\", b"\\u00", b"\xEF\xBB\xBF", b"\xC3", b"\xE2\x82", b"\xF0\x9F\x98", b"\xFF\xFE",
    b"null", b"1e999", b"-0", b"[[criterion]]", b"scale = \"1-5\"", b"needs = [\"context\"]",
    b"</answer>", b"{{", b"{%", b"\x00",
];

/// Little-endian integers that break size arithmetic.
const NUMBERS: &[u64] = &[0, 1, 2, 3, 31, 32, 33, 255, 256, 4095, 65535, 1 << 31, u32::MAX as u64, 1 << 32, 1 << 62, 1 << 63, u64::MAX];

fn mutate(rng: &mut ChaCha8Rng, input: &mut Vec<u8>, other: &[u8]) {
    let len = input.len();
    let at = if len == 0 { 0 } else { rng.random_range(0..len) };
    match rng.random_range(0..9) {
        0 if len > 0 => input[at] ^= 1 << rng.random_range(0..8),
        1 if len > 0 => input[at] = [0, 0xFF, 0x7F, 0x80, b'9', b' '][rng.random_range(0..6)],
        2 => {
            let t = TOKENS[rng.random_range(0..TOKENS.len())];
            input.splice(at..at, t.iter().copied());
        }
        3 if len > 0 => {
            let end = (at + rng.random_range(1..=16)).min(len);
            input.drain(at..end);
        }
        4 if len > 0 => {
            let end = (at + rng.random_range(1..=64)).min(len);
            let piece = input[at..end].to_vec();
            input.splice(at..at, piece);
        }
        5 if len >= 8 => {
            let n = NUMBERS[rng.random_range(0..NUMBERS.len())];
            let width = if rng.random_bool(0.5) { 4 } else { 8 };
            let at = at.min(len - width);
            input[at..at + width].copy_from_slice(&n.to_le_bytes()[..width]);
        }
        6 if !other.is_empty() => {
            let from = rng.random_range(0..other.len());
            let end = (from + rng.random_range(1..=128)).min(other.len());
            input.splice(at..at, other[from..end].iter().copied());
        }
        7 => input.truncate(at),
        _ => input.push(rng.random()),
    }
}

fn corpus(name: &str) -> Vec<Vec<u8>> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/fuzz-corpus").join(name);
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap_or_else(|e| panic!("corpus `{}`: {e}", dir.display()))
        .map(|e| e.expect("entry").path())
        .collect();
    files.sort();
    files.iter().map(|f| std::fs::read(f).expect("corpus file")).collect()
}

/// Inputs tried, accepted (parsed without error) and panicked.
struct Tally {
    tried: u64,
    accepted: u64,
    panics: u64,
}

/// Run one target.
fn fuzz(t: &Target, seed: u64, limit: Limit) -> Tally {
    let seeds = corpus(t.name);
    assert!(!seeds.is_empty(), "empty corpus for {}", t.name);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let start = Instant::now();
    let (mut tried, mut accepted, mut panics) = (0u64, 0u64, 0u64);
    while !limit.reached(tried, start) {
        let mut input = seeds[rng.random_range(0..seeds.len())].clone();
        let other = &seeds[rng.random_range(0..seeds.len())];
        for _ in 0..rng.random_range(1..=4) {
            mutate(&mut rng, &mut input, other);
        }
        tried += 1;
        let Err(_) = catch_unwind(AssertUnwindSafe(|| accepted += (t.parse)(&input) as u64)) else {
            continue;
        };
        panics += 1;
        let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("target/fuzz-failures");
        std::fs::create_dir_all(&dir).expect("mkdir");
        std::fs::write(dir.join(format!("{}-{tried}.bin", t.name)), &input).expect("save");
    }
    Tally { tried, accepted, panics }
}

#[derive(Clone, Copy)]
enum Limit {
    Inputs(u64),
    Time(Duration),
}

impl Limit {
    fn from_env() -> Limit {
        let var = |k| std::env::var(k).ok().and_then(|v| v.parse::<u64>().ok());
        match (var("ASSIZE_FUZZ_SECONDS"), var("ASSIZE_FUZZ_INPUTS")) {
            (Some(s), _) => Limit::Time(Duration::from_secs(s)),
            (None, n) => Limit::Inputs(n.unwrap_or(20_000)),
        }
    }

    fn reached(&self, tried: u64, start: Instant) -> bool {
        match self {
            Limit::Inputs(n) => tried >= *n,
            // Checked every 256 inputs: the clock only bounds the run, never a result.
            Limit::Time(d) => tried % 256 == 0 && start.elapsed() >= *d,
        }
    }
}

/// Every parser survives mutated inputs: no panic on any of them.
#[test]
fn parsers_never_panic_on_mutated_inputs() {
    let limit = Limit::from_env();
    let seed = std::env::var("ASSIZE_FUZZ_SEED").ok().and_then(|s| s.parse().ok()).unwrap_or(14);
    let hook = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    let results: Vec<(&str, Tally)> = TARGETS.iter().map(|t| (t.name, fuzz(t, seed, limit))).collect();
    std::panic::set_hook(hook);
    let mut total = 0;
    for (name, t) in &results {
        eprintln!(
            "fuzz {name:<14} {:>9} inputs ({:>7} accepted), {} panics",
            t.tried, t.accepted, t.panics
        );
        total += t.tried;
    }
    eprintln!("fuzz total          {total:>9} inputs (seed {seed})");
    let failed: Vec<&str> = results.iter().filter(|r| r.1.panics > 0).map(|r| r.0).collect();
    assert!(failed.is_empty(), "panics (inputs saved in target/fuzz-failures): {failed:?}");
}
