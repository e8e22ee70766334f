//! Report stage, JSON writer: the `assize.report/2` document (documented in
//! `docs/report-schema.md`). Input: a `Report`. Output: pretty JSON text ending in a
//! newline. Never adds or drops a field the schema does not list; undefined numbers
//! (e.g. an interval of one item) are written as `null`.

use super::Report;

/// The report as pretty-printed JSON.
pub fn render(report: &Report) -> String {
    let mut s =
        serde_json::to_string_pretty(report).expect("a report holds only serialisable data");
    s.push('\n');
    s
}
