//! Inline SVG charts for the HTML reports: step histograms, grouped bars and
//! a scatter with fitted curves. Plain strings, no scripts, no fonts beyond
//! the reader's default, so a report opens anywhere without a network.

use std::fmt::Write as _;

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

fn ticks(lo: f64, hi: f64, count: usize, decimals: usize) -> Vec<(f64, String)> {
    (0..=count)
        .map(|k| {
            let v = lo + (hi - lo) * k as f64 / count as f64;
            (v, format!("{v:.decimals$}"))
        })
        .collect()
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
    let (low, high) = series.first().map_or((-1.0, 1.0), |s| (s.low, s.high));
    let frame = Frame {
        x: (low, high),
        y: (0.0, top),
        height: HEIGHT,
    };
    let mut out = String::new();
    open(&mut out, HEIGHT, title);
    frame.axes(
        &mut out,
        &ticks(low, high, 8, 2),
        &ticks(0.0, top, 4, 3),
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

/// Grouped bars: for each group label, one bar per series (label, colour),
/// values in `[0, y_max]`.
pub(crate) fn bars(
    title: &str,
    groups: &[(String, Vec<f64>)],
    series: &[(&str, &str)],
    y_max: f64,
    y_label: &str,
) -> String {
    let frame = Frame {
        x: (0.0, groups.len().max(1) as f64),
        y: (0.0, y_max),
        height: HEIGHT,
    };
    let mut out = String::new();
    open(&mut out, HEIGHT, title);
    let x_ticks: Vec<(f64, String)> = groups
        .iter()
        .enumerate()
        .map(|(g, (label, _))| (g as f64 + 0.5, label.clone()))
        .collect();
    frame.axes(&mut out, &x_ticks, &ticks(0.0, y_max, 4, 0), "", y_label);
    let per = series.len().max(1) as f64;
    for (g, (_, values)) in groups.iter().enumerate() {
        for (k, (&v, (_, colour))) in values.iter().zip(series).enumerate() {
            let x0 = g as f64 + 0.1 + 0.8 * k as f64 / per;
            let x1 = x0 + 0.8 / per;
            let v = v.clamp(0.0, y_max);
            let (px0, px1, py) = (frame.px(x0), frame.px(x1), frame.py(v));
            let _ = write!(
                out,
                r#"<rect x="{px0:.1}" y="{py:.1}" width="{:.1}" height="{:.1}" fill="{colour}"><title>{:.2}</title></rect>"#,
                (px1 - px0 - 1.0).max(1.0),
                (frame.py(0.0) - py).max(0.0),
                v
            );
        }
    }
    out.push_str("</svg>");
    out + &legend(series)
}

/// A labelled line drawn over a scatter.
pub(crate) struct Curve<'a> {
    pub label: &'a str,
    pub points: Vec<(f64, f64)>,
    pub colour: &'a str,
}

/// A square scatter of `points` (x, y) over [lo, hi]^2 with the diagonal
/// dashed and `curves` drawn over it.
pub(crate) fn scatter(
    title: &str,
    points: &[[f64; 2]],
    curves: &[Curve],
    x_label: &str,
    y_label: &str,
) -> String {
    let (lo, hi) = points
        .iter()
        .flatten()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &v| {
            (a.min(v), b.max(v))
        });
    let (lo, hi) = if lo < hi {
        let pad = (hi - lo) * 0.05;
        (lo - pad, hi + pad)
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
        &ticks(lo, hi, 6, 2),
        &ticks(lo, hi, 6, 2),
        x_label,
        y_label,
    );
    for p in points {
        let _ = write!(
            out,
            r##"<circle cx="{:.1}" cy="{:.1}" r="1.8" fill="#555" fill-opacity="0.35"/>"##,
            frame.px(p[0]),
            frame.py(p[1])
        );
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
    let mut labels: Vec<(&str, &str)> = vec![("y = x", "#999")];
    labels.extend(curves.iter().map(|c| (c.label, c.colour)));
    out + &legend(&labels)
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
    fn bars_scale_to_the_axis() {
        // A value of half the axis is drawn half as high as the plot area.
        let svg = bars(
            "t",
            &[("R@1".into(), vec![50.0])],
            &[("a", "#000")],
            100.0,
            "%",
        );
        let full = HEIGHT - TOP - BOTTOM;
        assert!(
            svg.contains(&format!(r#"height="{:.1}""#, full / 2.0)),
            "{svg}"
        );
    }
}
