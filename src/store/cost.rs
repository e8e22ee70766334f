//! What a grading run cost: `cost.json` in the run folder, one entry per invocation
//! that computed records (grading time, prompt tokens computed and reused from shared
//! prefixes, tokens generated), written by the writer under the folder lock.
//! Input: a run folder. Output: the entries and their sum. Never part of a run's
//! identity: a folder without the file (made before it existed) reads as unrecorded.

use std::path::Path;

use serde::{Deserialize, Serialize};

use super::StoreError;

/// File name of the cost record inside a run folder.
pub const COST_FILE: &str = "cost.json";

/// The work of one invocation that computed records, or the sum of several.
#[derive(Debug, Clone, Copy, Default, PartialEq, Serialize, Deserialize)]
pub struct Cost {
    /// Records computed.
    pub records: u64,
    /// Wall-clock seconds spent grading (the judge's loading time excluded).
    pub seconds: f64,
    /// Prompt tokens run through the decoder.
    pub prompt_tokens_computed: u64,
    /// Prompt tokens served from a cached shared prefix instead.
    pub prompt_tokens_reused: u64,
    /// Tokens generated (reasoning-first assessments, judge-written steps).
    pub generated_tokens: u64,
}

impl Cost {
    /// The sum of two costs.
    pub fn add(self, o: Cost) -> Cost {
        Cost {
            records: self.records + o.records,
            seconds: self.seconds + o.seconds,
            prompt_tokens_computed: self.prompt_tokens_computed + o.prompt_tokens_computed,
            prompt_tokens_reused: self.prompt_tokens_reused + o.prompt_tokens_reused,
            generated_tokens: self.generated_tokens + o.generated_tokens,
        }
    }
}

/// The content of `cost.json`.
#[derive(Debug, Clone, Default, Serialize, Deserialize)]
pub struct CostLog {
    /// One entry per invocation that computed records, in order.
    pub sessions: Vec<Cost>,
}

impl CostLog {
    /// Everything the run's invocations cost together.
    pub fn total(&self) -> Cost {
        self.sessions.iter().fold(Cost::default(), |a, c| a.add(*c))
    }
}

/// The run's cost log; `None` when the folder has none (a run made before costs
/// were recorded, or one that computed nothing yet).
pub fn read_cost(dir: &Path) -> Result<Option<CostLog>, StoreError> {
    let path = dir.join(COST_FILE);
    match std::fs::read_to_string(&path) {
        Ok(text) => serde_json::from_str(&text)
            .map(Some)
            .map_err(|e| StoreError::Damaged {
                path,
                lines: e.to_string(),
            }),
        Err(e) if e.kind() == std::io::ErrorKind::NotFound => Ok(None),
        Err(e) => Err(StoreError::Io { path, source: e }),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sessions_add_up_and_a_missing_file_reads_as_unrecorded() {
        let dir = tempfile::tempdir().expect("tmp");
        assert!(read_cost(dir.path()).expect("read").is_none());
        let c = |r, s| Cost {
            records: r,
            seconds: s,
            prompt_tokens_computed: 10 * r,
            prompt_tokens_reused: r,
            generated_tokens: 0,
        };
        let log = CostLog {
            sessions: vec![c(2, 1.5), c(3, 2.0)],
        };
        std::fs::write(dir.path().join(COST_FILE), serde_json::to_string(&log).expect("json")).expect("write");
        let back = read_cost(dir.path()).expect("read").expect("present");
        assert_eq!(back.total(), c(5, 3.5));
    }
}
