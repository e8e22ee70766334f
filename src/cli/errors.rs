//! Error presentation for the binary: the chain of causes, a fix line where one is
//! known, and the exit code. Never decides what failed; it only describes it.

use std::fmt::Write as _;
use std::process::ExitCode;

use crate::engine::EngineError;

/// A requested gate (threshold) was not met: the run finished, exit code 1.
#[derive(Debug, thiserror::Error)]
#[error("gate failed: {0}")]
pub struct GateFailed(pub String);

/// A usage error with a known fix, raised by the command layer.
#[derive(Debug, thiserror::Error)]
#[error("{what}")]
pub struct Usage {
    /// What is wrong.
    pub what: String,
    /// What to do about it.
    pub fix: String,
}

/// Shorthand for a usage error.
pub fn usage(what: impl Into<String>, fix: impl Into<String>) -> anyhow::Error {
    Usage {
        what: what.into(),
        fix: fix.into(),
    }
    .into()
}

/// `error: …`, one `caused by:` line per source, and a `fix:` line when known.
pub fn render_error(err: &anyhow::Error) -> String {
    let mut out = String::new();
    let _ = writeln!(out, "error: {err}");
    for cause in err.chain().skip(1) {
        let _ = writeln!(out, "  caused by: {cause}");
    }
    if let Some(fix) = fix_for(err) {
        let _ = writeln!(out, "  fix: {fix}");
    }
    out
}

/// 1 for a failed gate, 2 for every other error (usage or input).
pub fn exit_code_for(err: &anyhow::Error) -> ExitCode {
    if err
        .chain()
        .any(|c| c.downcast_ref::<GateFailed>().is_some())
    {
        ExitCode::from(1)
    } else {
        ExitCode::from(2)
    }
}

fn fix_for(err: &anyhow::Error) -> Option<String> {
    for cause in err.chain() {
        if let Some(u) = cause.downcast_ref::<Usage>() {
            return Some(u.fix.clone());
        }
        if let Some(e) = cause.downcast_ref::<EngineError>() {
            return engine_fix(e);
        }
        if let Some(fix) = crate::data::fix_for(cause) {
            return Some(fix);
        }
        if let Some(fix) = crate::rubric::fix_for(cause) {
            return Some(fix);
        }
        if let Some(fix) = crate::vet::fix_for(cause) {
            return Some(fix);
        }
        if let Some(fix) = crate::store::fix_for(cause) {
            return Some(fix);
        }
        if let Some(fix) = crate::jobs::merge::fix_for(cause) {
            return Some(fix);
        }
    }
    None
}

fn engine_fix(e: &EngineError) -> Option<String> {
    Some(match e {
        EngineError::Io { .. } => {
            "check the path; fetch the known judges with `scripts/fetch-models --all`".into()
        }
        EngineError::NotGguf { .. } => "pass a GGUF model file (`*.gguf`)".into(),
        EngineError::Damaged { .. } => {
            "the file is damaged: delete it and fetch it again (`scripts/fetch-models`)".into()
        }
        EngineError::Truncated { .. } => {
            "the download was interrupted: delete the file and fetch it again".into()
        }
        EngineError::UnsupportedFeature { .. } => {
            "use a conversion of the model without that setting, or another judge".into()
        }
        EngineError::UnsupportedArch { .. } => {
            "use a model of a supported architecture (see `assize model info`)".into()
        }
        EngineError::ContextOverflow { .. } => {
            "shorten the item, drop few-shot anchors, or use a model with a longer context".into()
        }
        EngineError::Metadata { .. } | EngineError::Tensor { .. } => {
            "the file lacks what assize needs; try a GGUF converted by a current converter".into()
        }
        _ => return None,
    })
}
