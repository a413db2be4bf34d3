//! The report's plots, drawn with `plotters` into SVG text: small count
//! plots per position, the drift charts of a metric, and the alert timeline.
//! Colours from the Okabe & Ito (2008) palette, which stays distinct under
//! the common colour-vision deficiencies.

use plotters::coord::Shift;
use plotters::prelude::*;

use crate::html_report::data::{Episode, Trace};

/// Okabe–Ito colours.
pub mod palette {
    use plotters::style::RGBColor;
    /// Black.
    pub const BLACK: RGBColor = RGBColor(0, 0, 0);
    /// Orange (flagged frames, outlines).
    pub const ORANGE: RGBColor = RGBColor(230, 159, 0);
    /// Sky blue (control limits).
    pub const SKY_BLUE: RGBColor = RGBColor(86, 180, 233);
    /// Bluish green.
    pub const GREEN: RGBColor = RGBColor(0, 158, 115);
    /// Blue (counts and values).
    pub const BLUE: RGBColor = RGBColor(0, 114, 178);
    /// Vermillion (failures, drifting positions).
    pub const VERMILLION: RGBColor = RGBColor(213, 94, 0);
    /// Reddish purple (alert episodes).
    pub const PURPLE: RGBColor = RGBColor(204, 121, 167);
    /// The other colours, in order, for lines that need telling apart.
    pub const SERIES: [RGBColor; 5] = [BLUE, VERMILLION, GREEN, PURPLE, SKY_BLUE];
}

use palette::{BLACK, BLUE, GREEN, ORANGE, PURPLE, SERIES, SKY_BLUE, VERMILLION};

/// The time axis (acquisition time): milliseconds since the Unix epoch to
/// seconds, minutes or hours since the axis' start.
#[derive(Debug, Clone, Copy)]
pub struct TimeAxis {
    /// The axis' start (ms since the Unix epoch).
    pub start_ms: i64,
    /// Milliseconds per unit.
    pub unit_ms: f64,
    /// The unit's name (`min` or `h`).
    pub unit: &'static str,
    /// The axis' end, in units.
    pub end: f64,
}

impl TimeAxis {
    /// Seconds for a run shorter than three minutes, minutes for one shorter
    /// than three hours, hours otherwise.
    pub fn new(start_ms: i64, end_ms: i64) -> TimeAxis {
        let span = (end_ms - start_ms).max(1) as f64;
        let (unit_ms, unit) = if span < 180_000.0 {
            (1000.0, "s")
        } else if span < 3.0 * 3_600_000.0 {
            (60_000.0, "min")
        } else {
            (3_600_000.0, "h")
        };
        TimeAxis {
            start_ms,
            unit_ms,
            unit,
            end: (span / unit_ms) * 1.02,
        }
    }

    /// `at_ms` on the axis.
    pub fn at(&self, at_ms: i64) -> f64 {
        (at_ms - self.start_ms) as f64 / self.unit_ms
    }

    /// A tick label: whole units, or tenths on a short axis.
    fn tick(&self, x: f64) -> String {
        if self.end >= 5.0 {
            format!("{x:.0}")
        } else {
            format!("{x:.1}")
        }
    }

    fn label(&self) -> String {
        format!("acquired, time since start [{}]", self.unit)
    }
}

type Area<'a> = DrawingArea<SVGBackend<'a>, Shift>;

fn svg(size: (u32, u32), draw: impl FnOnce(&Area) -> Result<(), String>) -> Result<String, String> {
    let mut out = String::new();
    {
        let root = SVGBackend::with_string(&mut out, size).into_drawing_area();
        root.fill(&WHITE).map_err(|e| e.to_string())?;
        draw(&root)?;
        root.present().map_err(|e| e.to_string())?;
    }
    Ok(out)
}

/// A tick label for a metric's value: whole numbers from 100 up, three
/// significant digits below.
fn value_tick(v: f64) -> String {
    if v.abs() >= 100.0 {
        format!("{v:.0}")
    } else {
        let decimals = (2 - v.abs().max(1e-9).log10().floor() as i32).clamp(0, 6) as usize;
        format!("{v:.decimals$}")
    }
}

fn err(e: impl std::fmt::Display) -> String {
    e.to_string()
}

/// One frame on a count plot.
#[derive(Debug, Clone, Copy)]
pub struct CountPoint {
    /// When its file was acquired (ms since the Unix epoch).
    pub acquired_ms: i64,
    /// The count used; `None` for a failed frame.
    pub count: Option<i64>,
    /// True when the frame carries flags.
    pub flagged: bool,
}

/// A small plot of one position's count over time: the count in blue,
/// flagged frames as orange dots, failed frames as vermillion crosses on the
/// time axis. `y_max` is shared by every position so they compare at a glance.
///
/// # Errors
/// The plotting library's message.
pub fn count_plot(points: &[CountPoint], axis: &TimeAxis, y_max: f64) -> Result<String, String> {
    svg((220, 130), |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(4)
            .x_label_area_size(26)
            .y_label_area_size(34)
            .build_cartesian_2d(0f64..axis.end, 0f64..y_max)
            .map_err(err)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(4)
            .y_labels(4)
            .x_desc(axis.label())
            .y_desc("objects")
            .y_label_formatter(&|y| format!("{y:.0}"))
            .x_label_formatter(&|x| axis.tick(*x))
            .label_style(("sans-serif", 10))
            .axis_desc_style(("sans-serif", 10))
            .draw()
            .map_err(err)?;
        let done: Vec<(f64, f64)> = points
            .iter()
            .filter_map(|p| p.count.map(|c| (axis.at(p.acquired_ms), c as f64)))
            .collect();
        chart
            .draw_series(LineSeries::new(done.iter().copied(), BLUE.stroke_width(2)))
            .map_err(err)?;
        chart
            .draw_series(points.iter().filter(|p| p.flagged).filter_map(|p| {
                p.count
                    .map(|c| Circle::new((axis.at(p.acquired_ms), c as f64), 3, ORANGE.filled()))
            }))
            .map_err(err)?;
        chart
            .draw_series(
                points.iter().filter(|p| p.count.is_none()).map(|p| {
                    Cross::new((axis.at(p.acquired_ms), 0.0), 4, VERMILLION.stroke_width(2))
                }),
            )
            .map_err(err)?;
        Ok(())
    })
}

/// Spans of alert episodes on the (acquisition time) axis; open ones run to
/// its end.
fn spans(episodes: &[&Episode], axis: &TimeAxis) -> Vec<(f64, f64)> {
    episodes
        .iter()
        .map(|e| {
            let start = axis.at(e.opened_acquired_ms);
            let end = e.closed_acquired_ms.map_or(axis.end, |c| axis.at(c));
            (start, end.max(start + axis.end * 0.003))
        })
        .collect()
}

type Chart<'a, 'b> = ChartContext<
    'a,
    SVGBackend<'b>,
    Cartesian2d<plotters::coord::types::RangedCoordf64, plotters::coord::types::RangedCoordf64>,
>;

/// Shades the alert episodes across a chart whose values run from `lo` to `hi`.
fn shade_episodes(
    chart: &mut Chart,
    episodes: &[&Episode],
    axis: &TimeAxis,
    (lo, hi): (f64, f64),
) -> Result<(), String> {
    chart
        .draw_series(
            spans(episodes, axis)
                .into_iter()
                .map(|(a, b)| Rectangle::new([(a, lo), (b, hi)], PURPLE.mix(0.25).filled())),
        )
        .map_err(err)?;
    Ok(())
}

fn range(values: impl Iterator<Item = f64>) -> (f64, f64) {
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for v in values.filter(|v| v.is_finite()) {
        lo = lo.min(v);
        hi = hi.max(v);
    }
    if !lo.is_finite() {
        return (0.0, 1.0);
    }
    let pad = ((hi - lo) * 0.08).max(hi.abs().max(1e-9) * 0.01);
    (lo - pad, hi + pad)
}

/// Every position's EWMA statistic of one metric, in baseline sigmas (the
/// scale the drift charts judge on, the same for every position), with the
/// control limits (dashed) and the metric's alert episodes shaded. Positions
/// whose chart declared a drift are drawn in colour, the others in grey.
///
/// # Errors
/// The plotting library's message.
pub fn metric_overview(
    traces: &[Trace],
    episodes: &[&Episode],
    axis: &TimeAxis,
) -> Result<String, String> {
    let limit_at: Vec<(f64, f64)> = traces
        .iter()
        .max_by_key(|t| t.points.len())
        .map(|t| {
            t.points
                .iter()
                .filter_map(|p| p.limit.map(|l| (axis.at(p.acquired_ms), l)))
                .collect()
        })
        .unwrap_or_default();
    let (lo, hi) = range(
        traces
            .iter()
            .flat_map(|t| t.points.iter().filter_map(|p| p.ewma))
            .chain(limit_at.iter().flat_map(|&(_, l)| [l, -l])),
    );
    svg((760, 260), |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(8)
            .x_label_area_size(34)
            .y_label_area_size(54)
            .build_cartesian_2d(0f64..axis.end, lo..hi)
            .map_err(err)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc(axis.label())
            .x_label_formatter(&|x| axis.tick(*x))
            .y_desc("EWMA of (value - baseline) [baseline sigma]")
            .label_style(("sans-serif", 11))
            .axis_desc_style(("sans-serif", 11))
            .draw()
            .map_err(err)?;
        shade_episodes(&mut chart, episodes, axis, (lo, hi))?;
        for sign in [1.0, -1.0] {
            chart
                .draw_series(DashedLineSeries::new(
                    limit_at.iter().map(|&(x, l)| (x, sign * l)),
                    6,
                    4,
                    SKY_BLUE.stroke_width(2),
                ))
                .map_err(err)?;
        }
        chart
            .draw_series(LineSeries::new(
                [(0.0, 0.0), (axis.end, 0.0)],
                BLACK.mix(0.6),
            ))
            .map_err(err)?;
        let mut drifting = 0;
        for t in traces.iter().filter(|t| !t.drifted) {
            chart
                .draw_series(LineSeries::new(
                    t.points
                        .iter()
                        .filter_map(|p| p.ewma.map(|e| (axis.at(p.acquired_ms), e))),
                    RGBColor(150, 150, 150).mix(0.7),
                ))
                .map_err(err)?;
        }
        // Few drifting positions get a colour each and a legend; many share
        // vermillion (the page lists them).
        let legend = traces.iter().filter(|t| t.drifted).count() <= SERIES.len();
        for t in traces.iter().filter(|t| t.drifted) {
            let colour = if legend {
                SERIES[drifting % SERIES.len()]
            } else {
                VERMILLION
            };
            drifting += 1;
            let series = chart
                .draw_series(LineSeries::new(
                    t.points
                        .iter()
                        .filter_map(|p| p.ewma.map(|e| (axis.at(p.acquired_ms), e))),
                    colour.stroke_width(if legend { 2 } else { 1 }),
                ))
                .map_err(err)?;
            if legend {
                series.label(t.position.clone()).legend(move |(x, y)| {
                    PathElement::new([(x, y), (x + 14, y)], colour.stroke_width(2))
                });
            }
        }
        if drifting > 0 && legend {
            chart
                .configure_series_labels()
                .background_style(WHITE.mix(0.85))
                .border_style(BLACK.mix(0.3))
                .label_font(("sans-serif", 11))
                .position(SeriesLabelPosition::UpperLeft)
                .draw()
                .map_err(err)?;
        }
        Ok(())
    })
}

/// One position's values of one metric in the metric's own unit (`unit`):
/// the frames as dots, the EWMA as a line, the baseline mean (black) and the
/// EWMA's control limits around it (dashed), the alert episodes shaded.
///
/// # Errors
/// The plotting library's message.
pub fn metric_position(
    trace: &Trace,
    unit: &str,
    episodes: &[&Episode],
    axis: &TimeAxis,
) -> Result<String, String> {
    let (mean, sigma) = trace.baseline.unwrap_or((f64::NAN, f64::NAN));
    let ewma: Vec<(f64, f64)> = trace
        .points
        .iter()
        .filter_map(|p| p.ewma.map(|e| (axis.at(p.acquired_ms), mean + e * sigma)))
        .collect();
    let limits: Vec<(f64, f64, f64)> = trace
        .points
        .iter()
        .filter_map(|p| {
            p.limit
                .map(|l| (axis.at(p.acquired_ms), mean - l * sigma, mean + l * sigma))
        })
        .collect();
    let (lo, hi) = range(
        trace
            .points
            .iter()
            .map(|p| p.value)
            .chain(limits.iter().flat_map(|&(_, a, b)| [a, b])),
    );
    svg((370, 200), |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(6)
            .caption(&trace.position, ("sans-serif", 12))
            .x_label_area_size(30)
            .y_label_area_size(62)
            .build_cartesian_2d(0f64..axis.end, lo..hi)
            .map_err(err)?;
        chart
            .configure_mesh()
            .disable_mesh()
            .x_labels(5)
            .y_labels(5)
            .x_desc(axis.label())
            .x_label_formatter(&|x| axis.tick(*x))
            .y_label_formatter(&|y| value_tick(*y))
            .y_desc(unit)
            .label_style(("sans-serif", 10))
            .axis_desc_style(("sans-serif", 10))
            .draw()
            .map_err(err)?;
        shade_episodes(&mut chart, episodes, axis, (lo, hi))?;
        if mean.is_finite() {
            chart
                .draw_series(LineSeries::new([(0.0, mean), (axis.end, mean)], BLACK))
                .map_err(err)?;
        }
        for upper in [false, true] {
            chart
                .draw_series(DashedLineSeries::new(
                    limits
                        .iter()
                        .map(|&(x, a, b)| (x, if upper { b } else { a })),
                    5,
                    3,
                    SKY_BLUE.stroke_width(2),
                ))
                .map_err(err)?;
        }
        chart
            .draw_series(trace.points.iter().map(|p| {
                let colour = if p.in_drift { VERMILLION } else { BLUE };
                Circle::new((axis.at(p.acquired_ms), p.value), 2, colour.filled())
            }))
            .map_err(err)?;
        chart
            .draw_series(LineSeries::new(ewma, GREEN.stroke_width(2)))
            .map_err(err)?;
        Ok(())
    })
}

/// Every alert episode as a bar on its condition's row (open ones to the end
/// of the axis), notices as a tick.
///
/// # Errors
/// The plotting library's message.
pub fn alert_timeline(episodes: &[Episode], axis: &TimeAxis) -> Result<String, String> {
    let mut conditions: Vec<&str> = episodes.iter().map(|e| e.condition.as_str()).collect();
    conditions.sort_unstable();
    conditions.dedup();
    let rows = conditions.len().max(1);
    let height = 60 + 26 * rows as u32;
    svg((760, height), |root| {
        let mut chart = ChartBuilder::on(root)
            .margin(8)
            .x_label_area_size(34)
            .y_label_area_size(170)
            .build_cartesian_2d(0f64..axis.end, 0f64..rows as f64)
            .map_err(err)?;
        let names = conditions.clone();
        chart
            .configure_mesh()
            .disable_mesh()
            .x_desc(axis.label())
            .x_label_formatter(&|x| axis.tick(*x))
            .y_labels(rows * 2 + 1)
            .y_label_formatter(&move |y: &f64| {
                let i = (*y - 0.5).round();
                if (*y - 0.5 - i).abs() < 1e-6 && i >= 0.0 {
                    names
                        .get(i as usize)
                        .map(|s| (*s).to_string())
                        .unwrap_or_default()
                } else {
                    String::new()
                }
            })
            .label_style(("sans-serif", 11))
            .axis_desc_style(("sans-serif", 11))
            .draw()
            .map_err(err)?;
        for e in episodes {
            let row = conditions
                .iter()
                .position(|c| *c == e.condition)
                .unwrap_or(0) as f64;
            let (a, b) = spans(&[e], axis)[0];
            let colour = if e.closed_ms.is_some() {
                PURPLE
            } else {
                VERMILLION
            };
            chart
                .draw_series(std::iter::once(Rectangle::new(
                    [(a, row + 0.2), (b, row + 0.8)],
                    colour.filled(),
                )))
                .map_err(err)?;
        }
        Ok(())
    })
}
