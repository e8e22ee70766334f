//! Real-browser test of the HTML report: headless Chromium (Debian's `chromium`
//! package, `/usr/bin/chromium`, or `$ASSIZE_CHROMIUM`) opens the report from disk,
//! dumps the DOM and takes a screenshot. The test checks that every chart is drawn
//! (SVG elements with their ids and classes), that the flagged items and every graded
//! answer are browsable `<details>` elements, and that the page requested nothing from the network.
//!
//! Chromium itself phones home at start-up (update checks, clock, account probes)
//! even with background networking disabled; those requests carry no page initiator
//! ("not an origin") and are not the report's. A request the page makes has the
//! `file://` page as initiator. A control page with one remote image proves the
//! check sees such a request. The screenshot is kept at
//! `target/tmp/report-browser/report.png` for a person to look at.
//!
//! Without Chromium the test fails (it does not skip): install it with
//! `apt-get install -y chromium`.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

fn chromium() -> PathBuf {
    let p = std::env::var_os("ASSIZE_CHROMIUM")
        .map_or_else(|| PathBuf::from("/usr/bin/chromium"), PathBuf::from);
    assert!(
        p.exists(),
        "headless Chromium is needed for this test and `{}` does not exist; install it with `apt-get install -y chromium` (or point ASSIZE_CHROMIUM at a Chromium binary)",
        p.display()
    );
    p
}

/// Run Chromium headless on a local file with a fresh profile; returns stdout.
fn browse(page: &Path, work: &Path, extra: &[String]) -> String {
    let profile = tempfile::tempdir_in(work).expect("profile dir");
    let out_path = profile.path().join("stdout.txt");
    let mut cmd = Command::new(chromium());
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
    ])
    .arg(format!("--user-data-dir={}", profile.path().display()))
    .args(extra)
    .arg(format!("file://{}", page.display()))
    // stdout goes to a file: a pipe would fill up with the DOM while we wait.
    .stdout(Stdio::from(
        std::fs::File::create(&out_path).expect("stdout file"),
    ))
    .stderr(Stdio::null());
    let mut child = cmd.spawn().expect("start chromium");
    let start = Instant::now();
    loop {
        if child.try_wait().expect("poll chromium").is_some() {
            break;
        }
        if start.elapsed() > Duration::from_secs(120) {
            let _ = child.kill();
            panic!("chromium did not finish within 120 s");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    String::from_utf8_lossy(&std::fs::read(&out_path).expect("chromium stdout")).into_owned()
}

/// URLs of network requests the page itself started, from a Chromium net log.
fn page_requests(net_log: &Path) -> Vec<String> {
    let log: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(net_log).expect("net log written"))
            .expect("net log is JSON");
    let start_job = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
        .as_u64()
        .expect("event type constant");
    log["events"]
        .as_array()
        .expect("events")
        .iter()
        .filter(|e| e["type"].as_u64() == Some(start_job))
        .filter(|e| e["params"]["initiator"].as_str() != Some("not an origin"))
        .filter_map(|e| e["params"]["url"].as_str())
        .filter(|u| !u.starts_with("file:") && !u.starts_with("data:"))
        .map(str::to_string)
        .collect()
}

/// Every `src`, `href` and CSS `url(` target that is not an in-page anchor.
fn outside_references(html: &str) -> Vec<String> {
    let mut out = Vec::new();
    for key in ["src=\"", "href=\"", "src='", "href='", "url(", "@import"] {
        let mut rest = html;
        while let Some(i) = rest.find(key) {
            rest = &rest[i + key.len()..];
            let target: String = rest
                .chars()
                .take_while(|c| !matches!(c, '"' | '\'' | ')' | ' '))
                .collect();
            if !target.starts_with('#') {
                out.push(format!("{key}{target}"));
            }
        }
    }
    out
}

#[test]
fn html_report_draws_its_charts_in_a_browser_without_touching_the_network() {
    let work = tempfile::tempdir().expect("tmp");
    let page = work.path().join("report.html");
    let o = Command::new(env!("CARGO_BIN_EXE_assize"))
        .args([
            "report",
            "--grades",
            "tests/fixtures/report/before",
            "--grades",
            "tests/fixtures/report/after",
            "--pairs",
            "tests/fixtures/report/compare",
            "--labels",
            "tests/fixtures/report/labels.csv",
            "--preferences",
            "tests/fixtures/report/preferences.csv",
            "--answers",
            "tests/fixtures/report/answers.jsonl",
            "--resamples",
            "300",
            "--html",
        ])
        .arg(&page)
        .current_dir(root())
        .output()
        .expect("run assize");
    assert!(
        o.status.success(),
        "assize report failed:\n{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let html = std::fs::read_to_string(&page).expect("html written");
    assert_eq!(
        outside_references(&html),
        Vec::<String>::new(),
        "the page refers to something outside itself"
    );
    for tag in ["<script", "<link", "<iframe", "<object", "<embed"] {
        assert!(!html.contains(tag), "the page holds `{tag}`");
    }

    let net = work.path().join("net.json");
    let dom = browse(
        &page,
        work.path(),
        &[
            "--dump-dom".into(),
            format!("--log-net-log={}", net.display()),
        ],
    );
    assert!(
        dom.contains("Read this first"),
        "the browser rendered the page"
    );
    assert_eq!(
        page_requests(&net),
        Vec::<String>::new(),
        "the page requested these over the network"
    );

    // Fixture: 3 criteria graded in 2 runs, 2 of them labelled, and a comparison run:
    // 3 distribution charts, 2 x 2 heatmaps, 2 x 2 reliability diagrams, and the
    // before/after, position-bias and ranking charts.
    let mut ids = Vec::new();
    for (i, _) in dom.match_indices("<svg") {
        let tag = &dom[i..i + dom[i..].find('>').expect("closed tag")];
        assert!(
            tag.contains("class=\"chart "),
            "an svg without the chart class: {tag}"
        );
        let id = tag
            .split("id=\"")
            .nth(1)
            .and_then(|s| s.split('"').next())
            .expect("every chart has an id");
        ids.push(id.to_string());
    }
    let mut want: Vec<String> = [
        "dist-correctness",
        "dist-helpfulness",
        "dist-safety",
        "deltas",
        "position-bias",
        "ranking",
    ]
    .map(String::from)
    .to_vec();
    for run in 0..2 {
        for c in ["correctness", "helpfulness"] {
            want.push(format!("confusion-{run}-{c}"));
            want.push(format!("reliability-{run}-{c}"));
        }
    }
    ids.sort();
    want.sort();
    assert_eq!(ids, want);
    assert_eq!(dom.matches("class=\"chart chart-dist\"").count(), 3);
    assert_eq!(dom.matches("class=\"chart chart-confusion\"").count(), 4);
    assert_eq!(dom.matches("class=\"chart chart-reliability\"").count(), 4);
    assert_eq!(
        dom.matches("<details class=\"flag\"").count(),
        3,
        "one <details> per flagged item"
    );
    // The per-item view: one <details> per graded answer (12), flagged or not, each
    // with its table of grades (3 criteria x 2 runs = 6 rows).
    let items: Vec<&str> = dom.split("<details class=\"item").skip(1).collect();
    assert_eq!(items.len(), 12, "one <details> per graded answer");
    for item in &items {
        let table = &item[..item.find("</table>").expect("a grade table")];
        assert_eq!(table.matches("<tr>").count(), 1 + 6, "{table}");
    }
    assert!(dom.contains("id=\"only-flagged\""), "the flag filter is there");

    let shot = work.path().join("report.png");
    browse(
        &page,
        work.path(),
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1100,6000".into(),
        ],
    );
    let png = std::fs::read(&shot).expect("screenshot written");
    assert!(
        png.starts_with(b"\x89PNG\r\n\x1a\n"),
        "the screenshot is a PNG"
    );
    assert!(
        png.len() > 50_000,
        "the screenshot is not a blank page ({} bytes)",
        png.len()
    );
    let keep = PathBuf::from(env!("CARGO_TARGET_TMPDIR")).join("report-browser");
    std::fs::create_dir_all(&keep).expect("mkdir");
    std::fs::copy(&shot, keep.join("report.png")).expect("keep the screenshot");
}

/// The network check is not vacuous: a page with one remote image is caught.
#[test]
fn network_check_catches_a_page_that_loads_a_remote_image() {
    let work = tempfile::tempdir().expect("tmp");
    let page = work.path().join("remote.html");
    std::fs::write(
        &page,
        "<!DOCTYPE html><p>control page</p><img src=\"http://assize-check.invalid/pixel.png\">",
    )
    .expect("write page");
    assert_eq!(
        outside_references(&std::fs::read_to_string(&page).expect("read")),
        vec!["src=\"http://assize-check.invalid/pixel.png"]
    );
    let net = work.path().join("net.json");
    browse(
        &page,
        work.path(),
        &[
            "--dump-dom".into(),
            format!("--log-net-log={}", net.display()),
        ],
    );
    assert_eq!(
        page_requests(&net),
        vec!["http://assize-check.invalid/pixel.png"]
    );
}
