//! Report stage, chart geometry: places a `Report`'s numbers on inline-SVG canvases
//! (score distributions, confusion heatmaps, reliability diagrams, position bias,
//! ranking, before/after differences). Input: report parts. Output: plain view
//! models with pixel coordinates that `templates/charts.j2` draws. Never invents a
//! number: a missing interval is drawn as missing, not as zero width.
//!
//! Colours are the Okabe & Ito (2008) colour-blind-safe set; every coloured mark also
//! carries a text label, so no reading depends on colour alone.

use serde::Serialize;

use super::{CriterionInfo, DeltaRow, Position, Report, TrustRow};
use crate::probes::ranking::Ranking;

/// Okabe-Ito colours ordered low (vermillion) to high (blue) for ordinal scales.
const ORDINAL: [(u8, u8, u8); 5] = [
    (0xD5, 0x5E, 0x00),
    (0xE6, 0x9F, 0x00),
    (0xF0, 0xE4, 0x42),
    (0x56, 0xB4, 0xE9),
    (0x00, 0x72, 0xB2),
];

/// Fill and text colour of scale position `i` of `k` labels.
fn ordinal_colour(i: usize, k: usize) -> (String, &'static str) {
    let anchors: Vec<usize> = match k {
        1 => vec![4],
        2 => vec![0, 4],
        3 => vec![0, 2, 4],
        4 => vec![0, 1, 3, 4],
        5 => vec![0, 1, 2, 3, 4],
        _ => Vec::new(),
    };
    let (r, g, b) = if let Some(&a) = anchors.get(i) {
        ORDINAL[a]
    } else {
        // Longer scales: interpolate between neighbouring anchors.
        let t = i as f64 / (k - 1).max(1) as f64 * 4.0;
        let (lo, f) = ((t.floor() as usize).min(3), t - t.floor().min(3.0));
        let mix = |x: u8, y: u8| (x as f64 + (y as f64 - x as f64) * f).round() as u8;
        (
            mix(ORDINAL[lo].0, ORDINAL[lo + 1].0),
            mix(ORDINAL[lo].1, ORDINAL[lo + 1].1),
            mix(ORDINAL[lo].2, ORDINAL[lo + 1].2),
        )
    };
    let ink = if (r as f64 * 0.299 + g as f64 * 0.587 + b as f64 * 0.114) < 120.0 {
        "#ffffff"
    } else {
        "#111111"
    };
    (format!("#{r:02X}{g:02X}{b:02X}"), ink)
}

fn fin(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

/// Linear map of `v` from `[lo, hi]` onto `[a, b]`, rounded to 0.1 px.
fn map(v: f64, lo: f64, hi: f64, a: f64, b: f64) -> f64 {
    let t = if hi > lo { (v - lo) / (hi - lo) } else { 0.5 };
    ((a + t * (b - a)) * 10.0).round() / 10.0
}

/// A tick on an axis.
#[derive(Debug, Serialize)]
pub struct Tick {
    x: f64,
    label: String,
}

/// A labelled interval row (mean or estimate with optional interval).
#[derive(Debug, Serialize)]
pub struct IntervalRow {
    y: f64,
    label: String,
    x: f64,
    lo: Option<f64>,
    hi: Option<f64>,
    value: String,
    note: String,
    solid: bool,
}

/// One stacked segment.
#[derive(Debug, Serialize)]
pub struct Segment {
    x: f64,
    w: f64,
    fill: String,
    ink: &'static str,
    label: String,
    share: String,
    show: bool,
}

/// A stacked bar plus mean-with-interval row.
#[derive(Debug, Serialize)]
pub struct DistRow {
    y: f64,
    label: String,
    segments: Vec<Segment>,
    mean: IntervalRow,
}

/// Score distribution chart of one criterion.
#[derive(Debug, Serialize)]
pub struct DistChart {
    id: String,
    title: String,
    height: f64,
    legend: Vec<Segment>,
    rows: Vec<DistRow>,
    ticks: Vec<Tick>,
    axis_y: f64,
}

const BAR: (f64, f64) = (200.0, 470.0);
const MEAN: (f64, f64) = (520.0, 730.0);
const ROW_H: f64 = 30.0;
const TOP: f64 = 54.0;

/// Stacked mean distributions and means with intervals, one row per (run, system).
pub fn dist_chart(r: &Report, c: &CriterionInfo) -> DistChart {
    let k = c.labels.len();
    let (vlo, vhi) = (c.values[0], c.values[k - 1]);
    let legend = (0..k)
        .map(|i| {
            let (fill, ink) = ordinal_colour(i, k);
            Segment {
                x: BAR.0 + i as f64 * 46.0,
                w: 40.0,
                fill,
                ink,
                label: c.labels[i].clone(),
                share: String::new(),
                show: true,
            }
        })
        .collect();
    let mut rows = Vec::new();
    // Rows grouped by system, runs in order, so before and after sit together.
    let mut systems: Vec<&str> = r
        .runs
        .iter()
        .flat_map(|run| run.distributions.iter().map(|d| d.system.as_str()))
        .collect();
    systems.sort();
    systems.dedup();
    let pairs = systems
        .iter()
        .flat_map(|s| r.runs.iter().map(move |run| (*s, run)));
    for (system, run) in pairs {
        for d in run
            .distributions
            .iter()
            .filter(|d| d.criterion == c.key && d.system == system)
        {
            let y = TOP + rows.len() as f64 * ROW_H;
            let mut x = BAR.0;
            let segments = d
                .mean_probabilities
                .iter()
                .enumerate()
                .map(|(i, p)| {
                    let w = ((BAR.1 - BAR.0) * p * 10.0).round() / 10.0;
                    let (fill, ink) = ordinal_colour(i, k);
                    let s = Segment {
                        x,
                        w,
                        fill,
                        ink,
                        label: c.labels[i].clone(),
                        share: format!("{:.0}%", p * 100.0),
                        show: w >= 26.0,
                    };
                    x += w;
                    s
                })
                .collect();
            let s = run
                .summary
                .iter()
                .find(|s| s.system == d.system && s.criterion == c.key);
            let (mean, lo, hi) = s.map_or((f64::NAN, f64::NAN, f64::NAN), |s| {
                (s.mean, s.ci_low, s.ci_high)
            });
            let label = if r.runs.len() > 1 {
                format!("{} · {}", d.system, run.name)
            } else {
                d.system.clone()
            };
            rows.push(DistRow {
                y,
                segments,
                mean: IntervalRow {
                    y,
                    label: label.clone(),
                    x: map(mean, vlo, vhi, MEAN.0, MEAN.1),
                    lo: fin(lo).map(|v| map(v, vlo, vhi, MEAN.0, MEAN.1)),
                    hi: fin(hi).map(|v| map(v, vlo, vhi, MEAN.0, MEAN.1)),
                    value: if mean.is_finite() {
                        format!("{mean:.2}")
                    } else {
                        "n/a".into()
                    },
                    note: format!("n={}", d.n),
                    solid: true,
                },
                label,
            });
        }
    }
    let axis_y = TOP + rows.len() as f64 * ROW_H;
    let ticks = c
        .labels
        .iter()
        .zip(&c.values)
        .map(|(l, v)| Tick {
            x: map(*v, vlo, vhi, MEAN.0, MEAN.1),
            label: l.clone(),
        })
        .collect();
    DistChart {
        id: format!("dist-{}", c.key),
        title: format!("{}: judge's score distribution and mean", c.title),
        height: axis_y + 36.0,
        legend,
        rows,
        ticks,
        axis_y,
    }
}

/// One heatmap cell.
#[derive(Debug, Serialize)]
pub struct Cell {
    x: f64,
    y: f64,
    count: usize,
    opacity: f64,
    ink: &'static str,
    diagonal: bool,
}

/// Judge-versus-human confusion heatmap of one criterion in one run.
#[derive(Debug, Serialize)]
pub struct ConfusionChart {
    id: String,
    title: String,
    width: f64,
    height: f64,
    cells: Vec<Cell>,
    labels: Vec<(f64, String)>,
}

const CELL: f64 = 40.0;
const GRID0: (f64, f64) = (96.0, 56.0);

/// Rows: human consensus label; columns: judge label; shade = share of the row.
pub fn confusion_chart(run_index: usize, t: &TrustRow, c: &CriterionInfo) -> ConfusionChart {
    let mut cells = Vec::new();
    for (i, row) in t.confusion.iter().enumerate() {
        let total: usize = row.iter().sum();
        for (j, &count) in row.iter().enumerate() {
            let share = if total > 0 {
                count as f64 / total as f64
            } else {
                0.0
            };
            let opacity = if count == 0 {
                0.0
            } else {
                ((0.12 + 0.88 * share) * 100.0).round() / 100.0
            };
            cells.push(Cell {
                x: GRID0.0 + j as f64 * CELL,
                y: GRID0.1 + i as f64 * CELL,
                count,
                opacity,
                ink: if opacity > 0.55 { "#ffffff" } else { "#111111" },
                diagonal: i == j,
            });
        }
    }
    let labels = c
        .labels
        .iter()
        .enumerate()
        .map(|(i, l)| (i as f64 * CELL + CELL / 2.0, l.clone()))
        .collect();
    ConfusionChart {
        id: format!("confusion-{run_index}-{}", t.criterion),
        title: format!(
            "{}: human consensus (rows) against judge (columns)",
            c.title
        ),
        width: GRID0.0 + c.labels.len() as f64 * CELL + 8.0,
        height: GRID0.1 + c.labels.len() as f64 * CELL + 8.0,
        cells,
        labels,
    }
}

/// One reliability point.
#[derive(Debug, Serialize)]
pub struct RelPoint {
    x: f64,
    y: f64,
    r: f64,
    count: usize,
}

/// Reliability diagram of one criterion in one run.
#[derive(Debug, Serialize)]
pub struct ReliabilityChart {
    id: String,
    title: String,
    points: Vec<RelPoint>,
    path: String,
    ece: String,
}

const PLOT: (f64, f64, f64, f64) = (48.0, 236.0, 16.0, 204.0); // x0, x1, y0 (top), y1 (bottom)

/// Accuracy against confidence per non-empty bin; dot area grows with the bin's items.
pub fn reliability_chart(
    run_index: usize,
    t: &TrustRow,
    c: &CriterionInfo,
) -> Option<ReliabilityChart> {
    let cal = t.calibration.as_ref()?;
    let most = cal.bins.iter().map(|b| b.count).max().unwrap_or(1).max(1) as f64;
    let points: Vec<RelPoint> = cal
        .bins
        .iter()
        .map(|b| RelPoint {
            x: map(b.mean_confidence, 0.0, 1.0, PLOT.0, PLOT.1),
            y: map(b.accuracy, 0.0, 1.0, PLOT.3, PLOT.2),
            r: ((3.0 + 7.0 * (b.count as f64 / most).sqrt()) * 10.0).round() / 10.0,
            count: b.count,
        })
        .collect();
    let path = points
        .iter()
        .enumerate()
        .map(|(i, p)| format!("{}{} {}", if i == 0 { "M" } else { "L" }, p.x, p.y))
        .collect::<Vec<_>>()
        .join(" ");
    Some(ReliabilityChart {
        id: format!("reliability-{run_index}-{}", t.criterion),
        title: format!(
            "{}: how often the judge's top label matches the humans, by its confidence",
            c.title
        ),
        points,
        path,
        ece: format!("{:.3}", cal.ece),
    })
}

/// A chart of labelled interval rows on one axis (position bias, ranking, deltas).
#[derive(Debug, Serialize)]
pub struct IntervalChart {
    id: String,
    title: String,
    height: f64,
    rows: Vec<IntervalRow>,
    ticks: Vec<Tick>,
    axis_y: f64,
    reference: Option<Tick>,
}

const AXIS: (f64, f64) = (250.0, 640.0);

fn interval_chart(
    id: &str,
    title: String,
    rows: Vec<IntervalRow>,
    ticks: Vec<Tick>,
    reference: Option<Tick>,
) -> IntervalChart {
    let axis_y = TOP - 20.0 + rows.len() as f64 * ROW_H;
    IntervalChart {
        id: id.into(),
        title,
        height: axis_y + 36.0,
        rows,
        ticks,
        axis_y,
        reference,
    }
}

fn row(
    i: usize,
    label: String,
    (v, lo, hi): (f64, f64, f64),
    (a, b): (f64, f64),
    value: String,
    note: String,
    solid: bool,
) -> IntervalRow {
    IntervalRow {
        y: TOP - 20.0 + i as f64 * ROW_H,
        label,
        x: map(v, a, b, AXIS.0, AXIS.1),
        lo: fin(lo).map(|x| map(x, a, b, AXIS.0, AXIS.1)),
        hi: fin(hi).map(|x| map(x, a, b, AXIS.0, AXIS.1)),
        value,
        note,
        solid,
    }
}

fn ticks(lo: f64, hi: f64, step: f64, digits: usize) -> Vec<Tick> {
    let mut out = Vec::new();
    let mut v = (lo / step).ceil() * step;
    while v <= hi + 1e-9 {
        out.push(Tick {
            x: map(v, lo, hi, AXIS.0, AXIS.1),
            label: format!("{v:.digits$}"),
        });
        v += step;
    }
    out
}

/// First-slot win rate with its interval against the 0.5 line, and consistency.
pub fn position_chart(p: &Position) -> IntervalChart {
    let rows = vec![
        row(
            0,
            "first-slot win rate".into(),
            (p.first_slot_win_rate, p.first_slot_ci.0, p.first_slot_ci.1),
            (0.0, 1.0),
            format!("{:.2}", p.first_slot_win_rate),
            format!("[{:.2}, {:.2}]", p.first_slot_ci.0, p.first_slot_ci.1),
            true,
        ),
        row(
            1,
            "same winner in both orders".into(),
            (p.consistency, f64::NAN, f64::NAN),
            (0.0, 1.0),
            format!("{:.2}", p.consistency),
            format!("{} pairs", p.n_pairs),
            true,
        ),
    ];
    let reference = Some(Tick {
        x: map(0.5, 0.0, 1.0, AXIS.0, AXIS.1),
        label: "0.5: no slot preference".into(),
    });
    interval_chart(
        "position-bias",
        "Position bias: does the answer shown first win more often?".into(),
        rows,
        ticks(0.0, 1.0, 0.25, 2),
        reference,
    )
}

/// Each system's chance of beating an average system, with bootstrap intervals,
/// strongest first, against the even-chance line.
pub fn ranking_chart(k: &Ranking) -> IntervalChart {
    let rows = k
        .rows
        .iter()
        .enumerate()
        .map(|(i, r)| {
            row(
                i,
                r.system.clone(),
                (r.beats_average, r.beats_average_low, r.beats_average_high),
                (0.0, 1.0),
                format!("{:.0}%", r.beats_average * 100.0),
                format!(
                    "won {} of {}",
                    r.wins as f64 + 0.5 * r.ties as f64,
                    r.comparisons()
                ),
                true,
            )
        })
        .collect();
    let reference = Some(Tick {
        x: map(0.5, 0.0, 1.0, AXIS.0, AXIS.1),
        label: "even chance".into(),
    });
    interval_chart(
        "ranking",
        "Chance of beating a system of average strength (Bradley-Terry), 95% bootstrap interval"
            .into(),
        rows,
        ticks(0.0, 1.0, 0.25, 2),
        reference,
    )
}

/// Later-minus-baseline differences with their intervals against the zero line.
pub fn delta_chart(deltas: &[DeltaRow], runs: usize) -> IntervalChart {
    let m = deltas
        .iter()
        .flat_map(|d| {
            [
                d.difference,
                d.ci.map_or(0.0, |c| c.0),
                d.ci.map_or(0.0, |c| c.1),
            ]
        })
        .filter(|v| v.is_finite())
        .fold(0.25_f64, |a, v| a.max(v.abs()));
    let m = (m * 4.0).ceil() / 4.0;
    let rows = deltas
        .iter()
        .enumerate()
        .map(|(i, d)| {
            let label = if runs > 2 {
                format!("{} · {} ({})", d.system, d.criterion, d.run)
            } else {
                format!("{} · {}", d.system, d.criterion)
            };
            let (lo, hi) = d.ci.unwrap_or((f64::NAN, f64::NAN));
            let note = if d.ci.is_none() {
                "no interval"
            } else if d.beyond_ci {
                "beyond CI"
            } else {
                "within CI"
            };
            row(
                i,
                label,
                (d.difference, lo, hi),
                (-m, m),
                format!("{:+.2}", d.difference),
                note.into(),
                d.beyond_ci,
            )
        })
        .collect();
    let step = if m > 1.0 { 0.5 } else { 0.25 };
    let reference = Some(Tick {
        x: map(0.0, -m, m, AXIS.0, AXIS.1),
        label: "0: no change".into(),
    });
    interval_chart(
        "deltas",
        "Before and after: difference in mean expected score, 95% paired bootstrap interval".into(),
        rows,
        ticks(-m, m, step, 2),
        reference,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Okabe & Ito (2008): vermillion is #D55E00 and blue #0072B2; a two-label scale
    /// uses exactly these two, low to high.
    #[test]
    fn two_label_scale_uses_vermillion_then_blue() {
        assert_eq!(ordinal_colour(0, 2).0, "#D55E00");
        assert_eq!(ordinal_colour(1, 2).0, "#0072B2");
    }

    #[test]
    fn axis_mapping_puts_the_ends_on_the_plot_edges() {
        assert_eq!(map(0.0, 0.0, 1.0, 250.0, 640.0), 250.0);
        assert_eq!(map(1.0, 0.0, 1.0, 250.0, 640.0), 640.0);
        assert_eq!(map(0.5, 0.0, 1.0, 250.0, 640.0), 445.0);
    }
}
