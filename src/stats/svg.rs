//! Inline SVG charts for the HTML reports: step histograms, grouped bars and
//! a scatter with fitted curves. Plain strings, no scripts, no fonts beyond
//! the reader's default, so a report opens anywhere without a network.

use std::fmt::Write as _;

use super::intervals::Interval;
use super::summary::RoundStep;

/// Escapes text for HTML element content and attribute values.
pub(crate) fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for ch in text.chars() {
        match ch {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(ch),
        }
    }
    out
}

/// Colours of the series, distinguishable in print and for most colour-blind
/// readers (Okabe and Ito 2008).
pub(crate) const PALETTE: [&str; 6] = [
    "#0072B2", "#D55E00", "#009E73", "#CC79A7", "#E69F00", "#56B4E9",
];

const WIDTH: f64 = 640.0;
const HEIGHT: f64 = 320.0;
const LEFT: f64 = 56.0;
const RIGHT: f64 = 16.0;
const TOP: f64 = 16.0;
const BOTTOM: f64 = 44.0;

/// A rectangle of data coordinates mapped onto the drawing area.
struct Frame {
    x: (f64, f64),
    y: (f64, f64),
    height: f64,
}

impl Frame {
    fn px(&self, x: f64) -> f64 {
        LEFT + (x - self.x.0) / (self.x.1 - self.x.0) * (WIDTH - LEFT - RIGHT)
    }

    fn py(&self, y: f64) -> f64 {
        self.height - BOTTOM - (y - self.y.0) / (self.y.1 - self.y.0) * (self.height - TOP - BOTTOM)
    }

    /// Axes, grid lines and tick labels.
    fn axes(
        &self,
        out: &mut String,
        x_ticks: &[(f64, String)],
        y_ticks: &[(f64, String)],
        x_label: &str,
        y_label: &str,
    ) {
        for (v, label) in y_ticks {
            let y = self.py(*v);
            let _ = write!(
                out,
                r##"<line x1="{LEFT}" y1="{y:.1}" x2="{:.1}" y2="{y:.1}" stroke="#ddd"/><text x="{:.1}" y="{:.1}" text-anchor="end" class="tick">{}</text>"##,
                WIDTH - RIGHT,
                LEFT - 4.0,
                y + 4.0,
                escape(label)
            );
        }
        for (v, label) in x_ticks {
            let x = self.px(*v);
            let _ = write!(
                out,
                r##"<line x1="{x:.1}" y1="{:.1}" x2="{x:.1}" y2="{:.1}" stroke="#ccc"/><text x="{x:.1}" y="{:.1}" text-anchor="middle" class="tick">{}</text>"##,
                self.height - BOTTOM,
                self.height - BOTTOM + 4.0,
                self.height - BOTTOM + 16.0,
                escape(label)
            );
        }
        let _ = write!(
            out,
            r##"<line x1="{LEFT}" y1="{b:.1}" x2="{:.1}" y2="{b:.1}" stroke="#333"/><line x1="{LEFT}" y1="{TOP}" x2="{LEFT}" y2="{b:.1}" stroke="#333"/><text x="{:.1}" y="{:.1}" text-anchor="middle" class="label">{}</text><text x="12" y="{:.1}" text-anchor="middle" class="label" transform="rotate(-90 12 {:.1})">{}</text>"##,
            WIDTH - RIGHT,
            (LEFT + WIDTH - RIGHT) / 2.0,
            self.height - 6.0,
            escape(x_label),
            (TOP + self.height - BOTTOM) / 2.0,
            (TOP + self.height - BOTTOM) / 2.0,
            escape(y_label),
            b = self.height - BOTTOM,
        );
    }

    fn polyline(&self, out: &mut String, points: &[(f64, f64)], colour: &str, dash: bool) {
        let coords: Vec<String> = points
            .iter()
            .map(|&(x, y)| format!("{:.1},{:.1}", self.px(x), self.py(y)))
            .collect();
        let _ = write!(
            out,
            r#"<polyline fill="none" stroke="{colour}" stroke-width="2"{} points="{}"/>"#,
            if dash {
                r#" stroke-dasharray="5 4""#
            } else {
                ""
            },
            coords.join(" ")
        );
    }
}

fn open(out: &mut String, height: f64, title: &str) {
    let _ = write!(
        out,
        r#"<svg viewBox="0 0 {WIDTH} {height}" width="{WIDTH}" height="{height}" role="img" aria-label="{}">"#,
        escape(title)
    );
}

/// A legend as HTML: one coloured swatch per series.
pub(crate) fn legend(series: &[(&str, &str)]) -> String {
    let mut out = String::from(r#"<p class="legend">"#);
    for (label, colour) in series {
        let _ = write!(
            out,
            r#"<span><i style="background:{colour}"></i>{}</span>"#,
            escape(label)
        );
    }
    out.push_str("</p>");
    out
}

/// Ticks at the round multiples within [lo, hi], at most about `count`
/// of them, printed with the decimals the step needs (0.35, not 0.3500).
fn ticks(lo: f64, hi: f64, count: usize) -> Vec<(f64, String)> {
    let step = RoundStep::covering(hi - lo, count);
    let decimals = step.decimals();
    step.multiples_within(lo, hi)
        .into_iter()
        .map(|v| (v, format!("{v:.decimals$}")))
        .collect()
}

/// [lo, hi] widened to the round step's multiples around it.
fn round_out(lo: f64, hi: f64, count: usize) -> (f64, f64) {
    let step = RoundStep::covering(hi - lo, count);
    let size = step.size();
    (
        step.multiple((lo / size + 1e-9).floor() as i64),
        step.multiple((hi / size - 1e-9).ceil() as i64),
    )
}

/// One histogram series: a label, the counts per bin over [low, high], a colour.
pub(crate) struct HistogramSeries<'a> {
    pub label: &'a str,
    pub low: f64,
    pub high: f64,
    pub counts: &'a [u64],
    pub colour: &'a str,
}

/// Step outlines of histograms as fractions of each series' total, so series
/// of very different sizes (true pairs against all negatives) share an axis.
pub(crate) fn histograms(title: &str, series: &[HistogramSeries]) -> String {
    let fractions: Vec<Vec<f64>> = series
        .iter()
        .map(|s| {
            let total = s.counts.iter().sum::<u64>().max(1) as f64;
            s.counts.iter().map(|&c| c as f64 / total).collect()
        })
        .collect();
    let top = fractions
        .iter()
        .flatten()
        .fold(0.0f64, |m, &v| m.max(v))
        .max(1e-9)
        * 1.1;
    let (low, high) = series
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), s| {
            (a.min(s.low), b.max(s.high))
        });
    let (low, high) = if low < high { (low, high) } else { (-1.0, 1.0) };
    let frame = Frame {
        x: (low, high),
        y: (0.0, top),
        height: HEIGHT,
    };
    let mut out = String::new();
    open(&mut out, HEIGHT, title);
    frame.axes(
        &mut out,
        &ticks(low, high, 10),
        &ticks(0.0, top, 4),
        "cosine",
        "fraction of pairs",
    );
    for (s, f) in series.iter().zip(&fractions) {
        let width = (s.high - s.low) / f.len().max(1) as f64;
        let mut points = vec![(s.low, 0.0)];
        for (k, &v) in f.iter().enumerate() {
            let x0 = s.low + k as f64 * width;
            points.push((x0, v));
            points.push((x0 + width, v));
        }
        points.push((s.high, 0.0));
        frame.polyline(&mut out, &points, s.colour, false);
    }
    out.push_str("</svg>");
    let labels: Vec<(&str, &str)> = series.iter().map(|s| (s.label, s.colour)).collect();
    out + &legend(&labels)
}

/// A labelled line drawn over a scatter.
pub(crate) struct Curve<'a> {
    pub label: &'a str,
    pub points: Vec<(f64, f64)>,
    pub colour: &'a str,
}

/// One coloured group of scatter points.
pub(crate) struct PointGroup<'a> {
    pub label: &'a str,
    pub colour: &'a str,
    pub points: Vec<[f64; 2]>,
}

/// A square scatter of point groups (x, y) over [lo, hi]^2 with the
/// diagonal dashed and `curves` drawn over it.
pub(crate) fn scatter(
    title: &str,
    groups: &[PointGroup],
    curves: &[Curve],
    x_label: &str,
    y_label: &str,
) -> String {
    let (lo, hi) = groups
        .iter()
        .flat_map(|g| g.points.iter().flatten())
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let (lo, hi) = if lo < hi {
        round_out(lo, hi, 8)
    } else {
        (-1.0, 1.0)
    };
    let height = WIDTH - LEFT - RIGHT + TOP + BOTTOM;
    let frame = Frame {
        x: (lo, hi),
        y: (lo, hi),
        height,
    };
    let mut out = String::new();
    open(&mut out, height, title);
    frame.axes(
        &mut out,
        &ticks(lo, hi, 8),
        &ticks(lo, hi, 8),
        x_label,
        y_label,
    );
    for g in groups {
        for p in &g.points {
            let _ = write!(
                out,
                r#"<circle cx="{:.1}" cy="{:.1}" r="1.8" fill="{}" fill-opacity="0.45"/>"#,
                frame.px(p[0]),
                frame.py(p[1]),
                g.colour
            );
        }
    }
    frame.polyline(&mut out, &[(lo, lo), (hi, hi)], "#999", true);
    for curve in curves {
        let clipped: Vec<(f64, f64)> = curve
            .points
            .iter()
            .map(|&(x, y)| (x, y.clamp(lo, hi)))
            .collect();
        frame.polyline(&mut out, &clipped, curve.colour, false);
    }
    out.push_str("</svg>");
    let mut labels: Vec<(&str, &str)> = groups.iter().map(|g| (g.label, g.colour)).collect();
    labels.push(("y = x", "#999"));
    labels.extend(curves.iter().map(|c| (c.label, c.colour)));
    out + &legend(&labels)
}

/// ROC curves on the unit square, the chance diagonal dashed.
pub(crate) fn roc_curves(title: &str, curves: &[Curve]) -> String {
    let height = WIDTH - LEFT - RIGHT + TOP + BOTTOM;
    let frame = Frame {
        x: (0.0, 1.0),
        y: (0.0, 1.0),
        height,
    };
    let mut out = String::new();
    open(&mut out, height, title);
    frame.axes(
        &mut out,
        &ticks(0.0, 1.0, 5),
        &ticks(0.0, 1.0, 5),
        "false-positive rate (contrasts above the threshold)",
        "true-positive rate (true captions above it)",
    );
    frame.polyline(&mut out, &[(0.0, 0.0), (1.0, 1.0)], "#999", true);
    for curve in curves {
        frame.polyline(&mut out, &curve.points, curve.colour, false);
    }
    out.push_str("</svg>");
    let mut labels: Vec<(&str, &str)> = curves.iter().map(|c| (c.label, c.colour)).collect();
    labels.push(("chance", "#999"));
    out + &legend(&labels)
}

/// One estimate with its interval, for [`estimates`].
pub(crate) struct Estimate {
    pub value: f64,
    pub interval: Option<Interval>,
}

/// Dots with interval whiskers, one per series in each group, on a value
/// axis that starts at the round value below the lowest bound (not at 0),
/// so that rates of 97 and 99 % are told apart; ends at most at `y_max`.
pub(crate) fn estimates(
    title: &str,
    groups: &[(String, Vec<Estimate>)],
    series: &[(&str, &str)],
    y_max: f64,
    y_label: &str,
) -> String {
    let bounds = groups.iter().flat_map(|(_, e)| e).flat_map(|e| {
        let (lo, hi) = e.interval.map_or((e.value, e.value), |i| (i.low, i.high));
        [lo, hi]
    });
    let (lo, hi) = bounds.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), v| {
        (a.min(v), b.max(v))
    });
    let (lo, hi) = if lo.is_finite() && lo < hi {
        let (lo, hi) = round_out(lo, hi, 5);
        (lo.max(0.0), hi.min(y_max))
    } else {
        (0.0, y_max)
    };
    let frame = Frame {
        x: (0.0, groups.len().max(1) as f64),
        y: (lo, hi),
        height: HEIGHT,
    };
    let mut out = String::new();
    open(&mut out, HEIGHT, title);
    let x_ticks: Vec<(f64, String)> = groups
        .iter()
        .enumerate()
        .map(|(g, (label, _))| (g as f64 + 0.5, label.clone()))
        .collect();
    frame.axes(&mut out, &x_ticks, &ticks(lo, hi, 5), "", y_label);
    let per = series.len().max(1) as f64;
    for (g, (_, values)) in groups.iter().enumerate() {
        for (k, (e, (_, colour))) in values.iter().zip(series).enumerate() {
            let x = frame.px(g as f64 + 0.2 + 0.6 * (k as f64 + 0.5) / per);
            if let Some(i) = e.interval {
                let _ = write!(
                    out,
                    r#"<line x1="{x:.1}" y1="{:.1}" x2="{x:.1}" y2="{:.1}" stroke="{colour}" stroke-width="2"/>"#,
                    frame.py(i.low.clamp(lo, hi)),
                    frame.py(i.high.clamp(lo, hi)),
                );
            }
            let interval = e
                .interval
                .map_or_else(String::new, |i| format!(" ({:.1} to {:.1})", i.low, i.high));
            let _ = write!(
                out,
                r#"<circle cx="{x:.1}" cy="{:.1}" r="4" fill="{colour}"><title>{:.1}{interval}</title></circle>"#,
                frame.py(e.value.clamp(lo, hi)),
                e.value,
            );
        }
    }
    out.push_str("</svg>");
    out + &legend(series)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escape_covers_markup_and_quotes() {
        assert_eq!(
            escape(r#"<a href="x">&'"#),
            "&lt;a href=&quot;x&quot;&gt;&amp;&#39;"
        );
    }

    #[test]
    fn estimates_axis_starts_near_the_data_not_at_zero() {
        // Rates 97 and 99 % with intervals from 93.1 to 99.8: at most five
        // round steps cover them in steps of 2 (6.9 / 2 <= 5), from 92 to
        // 100, so a tick reads 92 and none 0.
        let e = |value, low, high| Estimate {
            value,
            interval: Some(Interval { low, high }),
        };
        let svg = estimates(
            "t",
            &[(
                "colour".into(),
                vec![e(97.0, 93.1, 98.9), e(99.0, 96.4, 99.8)],
            )],
            &[("a", "#000"), ("b", "#111")],
            100.0,
            "%",
        );
        assert!(svg.contains(">92<") && svg.contains(">100<"), "{svg}");
        assert!(!svg.contains(">0<"), "{svg}");
        // The dot of 97 sits 5/8 of the way up the plot area.
        let y = HEIGHT - BOTTOM - 0.625 * (HEIGHT - TOP - BOTTOM);
        assert!(svg.contains(&format!(r#"cy="{y:.1}" r="4""#)), "{svg}");
    }

    #[test]
    fn histogram_ticks_are_round() {
        let svg = histograms(
            "t",
            &[HistogramSeries {
                label: "x",
                low: 0.3,
                high: 1.0,
                counts: &[1, 2, 3, 4],
                colour: "#000",
            }],
        );
        for tick in ["0.3", "0.5", "0.8", "1.0"] {
            assert!(svg.contains(&format!(">{tick}<")), "{tick}: {svg}");
        }
        assert!(!svg.contains("0.39"), "{svg}");
    }
}
