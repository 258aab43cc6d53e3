//! A small SVG plotting module for the HTML report: linear axes with "nice"
//! ticks, axis labels with units, a title, and layers (lines, scatter points,
//! histogram bars, categorical bars, reference lines). Output is an inline
//! `<svg>` element sized by its `viewBox`, so it scales with the page.
//!
//! Everything is drawn from plain numbers; non-finite values are dropped, and
//! a plot with no finite data renders an empty frame with a "no data" note
//! instead of failing.

use std::fmt::Write as _;

/// Colours used for series, in order (our own palette).
pub const PALETTE: [&str; 8] = [
    "#2f6db5", "#d9822b", "#3a9a5b", "#b8424b", "#7d5ba6", "#8c6d3f", "#c2569b", "#5f6b73",
];

/// What a layer draws.
#[derive(Debug, Clone)]
pub enum Layer {
    /// A polyline through the points (in x order as given).
    Line {
        /// Legend text.
        label: String,
        /// (x, y) points.
        points: Vec<(f64, f64)>,
        /// CSS colour.
        color: String,
        /// Dashed stroke.
        dashed: bool,
    },
    /// Points as small circles.
    Scatter {
        /// Legend text.
        label: String,
        /// (x, y) points.
        points: Vec<(f64, f64)>,
        /// CSS colour.
        color: String,
    },
    /// Bars spanning `[x0, x1]` from 0 to `height` (histograms).
    Bars {
        /// Legend text.
        label: String,
        /// (x0, x1, height).
        bars: Vec<(f64, f64, f64)>,
        /// CSS colour.
        color: String,
        /// Fill opacity in [0, 1].
        opacity: f64,
    },
}

/// The x axis: numbers or named categories (bar charts).
#[derive(Debug, Clone)]
pub enum XAxis {
    /// A linear numeric axis.
    Linear,
    /// One slot per category; layers use x = slot index (0, 1, ...) and bars
    /// span `[i - 0.4, i + 0.4]`.
    Categories(Vec<String>),
}

/// One plot.
#[derive(Debug, Clone)]
pub struct Plot {
    /// Title above the plot.
    pub title: String,
    /// X axis label (with unit).
    pub x_label: String,
    /// Y axis label (with unit).
    pub y_label: String,
    /// X axis kind.
    pub x_axis: XAxis,
    /// Fixed x range, else from the data.
    pub x_range: Option<(f64, f64)>,
    /// Fixed y range, else from the data (bars always include 0).
    pub y_range: Option<(f64, f64)>,
    /// Layers drawn in order.
    pub layers: Vec<Layer>,
    /// Width in SVG units.
    pub width: f64,
    /// Height in SVG units.
    pub height: f64,
}

impl Plot {
    /// A numeric plot with the given title and axis labels.
    pub fn new(title: &str, x_label: &str, y_label: &str) -> Self {
        Self {
            title: title.into(),
            x_label: x_label.into(),
            y_label: y_label.into(),
            x_axis: XAxis::Linear,
            x_range: None,
            y_range: None,
            layers: Vec::new(),
            width: 420.0,
            height: 280.0,
        }
    }

    /// Adds a line.
    pub fn line(mut self, label: &str, points: Vec<(f64, f64)>, color: &str) -> Self {
        self.layers.push(Layer::Line {
            label: label.into(),
            points,
            color: color.into(),
            dashed: false,
        });
        self
    }

    /// Adds a dashed line.
    pub fn dashed(mut self, label: &str, points: Vec<(f64, f64)>, color: &str) -> Self {
        self.layers.push(Layer::Line {
            label: label.into(),
            points,
            color: color.into(),
            dashed: true,
        });
        self
    }

    /// Adds scatter points.
    pub fn scatter(mut self, label: &str, points: Vec<(f64, f64)>, color: &str) -> Self {
        self.layers.push(Layer::Scatter {
            label: label.into(),
            points,
            color: color.into(),
        });
        self
    }

    /// Adds bars `(x0, x1, height)`.
    pub fn bars(
        mut self,
        label: &str,
        bars: Vec<(f64, f64, f64)>,
        color: &str,
        opacity: f64,
    ) -> Self {
        self.layers.push(Layer::Bars {
            label: label.into(),
            bars,
            color: color.into(),
            opacity,
        });
        self
    }

    /// Adds a histogram from bin `edges` (n + 1) and `counts` (n).
    pub fn histogram(
        self,
        label: &str,
        edges: &[f64],
        counts: &[f64],
        color: &str,
        opacity: f64,
    ) -> Self {
        let bars = edges
            .windows(2)
            .zip(counts)
            .map(|(e, &c)| (e[0], e[1], c))
            .collect();
        self.bars(label, bars, color, opacity)
    }

    /// Makes the x axis categorical.
    pub fn categories(mut self, names: Vec<String>) -> Self {
        self.x_axis = XAxis::Categories(names);
        self
    }

    /// Fixes the x range.
    pub fn x_range(mut self, lo: f64, hi: f64) -> Self {
        self.x_range = Some((lo, hi));
        self
    }

    /// Fixes the y range.
    pub fn y_range(mut self, lo: f64, hi: f64) -> Self {
        self.y_range = Some((lo, hi));
        self
    }

    /// Sets the size in SVG units.
    pub fn size(mut self, width: f64, height: f64) -> Self {
        self.width = width;
        self.height = height;
        self
    }

    fn data_ranges(&self) -> (Option<(f64, f64)>, Option<(f64, f64)>) {
        let mut xs = Range::default();
        let mut ys = Range::default();
        for layer in &self.layers {
            match layer {
                Layer::Line { points, .. } | Layer::Scatter { points, .. } => {
                    for &(x, y) in points {
                        if x.is_finite() && y.is_finite() {
                            xs.add(x);
                            ys.add(y);
                        }
                    }
                }
                Layer::Bars { bars, .. } => {
                    for &(x0, x1, h) in bars {
                        if x0.is_finite() && x1.is_finite() && h.is_finite() {
                            xs.add(x0);
                            xs.add(x1);
                            ys.add(h);
                            ys.add(0.0);
                        }
                    }
                }
            }
        }
        (xs.get(), ys.get())
    }

    /// Renders the plot as an inline `<svg>` element.
    pub fn to_svg(&self) -> String {
        let (w, h) = (self.width, self.height);
        let (left, right, top, bottom) = (58.0, 12.0, 30.0, 44.0);
        let legend: Vec<(&str, &str)> = self
            .layers
            .iter()
            .filter_map(|l| {
                let (label, color) = match l {
                    Layer::Line { label, color, .. }
                    | Layer::Scatter { label, color, .. }
                    | Layer::Bars { label, color, .. } => (label, color),
                };
                (!label.is_empty()).then_some((label.as_str(), color.as_str()))
            })
            .collect();
        let legend_h = if legend.is_empty() { 0.0 } else { 16.0 };
        let (pw, ph) = (w - left - right, h - top - bottom - legend_h);
        let (data_x, data_y) = self.data_ranges();
        let categorical = match &self.x_axis {
            XAxis::Categories(c) => Some(c),
            XAxis::Linear => None,
        };
        let x_dom = match (categorical, self.x_range, data_x) {
            (Some(c), _, _) => Some((-0.5, c.len().max(1) as f64 - 0.5)),
            (None, Some(r), _) => Some(r),
            (None, None, d) => d.map(|(a, b)| pad(a, b, false)),
        };
        let y_dom = match (self.y_range, data_y) {
            (Some(r), _) => Some(r),
            (None, d) => d.map(|(a, b)| pad(a, b, true)),
        };
        let mut s = String::new();
        let _ = write!(
            s,
            r#"<svg class="plot" viewBox="0 0 {w} {h}" width="{w}" height="{h}" role="img" xmlns="http://www.w3.org/2000/svg"><title>{}</title>"#,
            esc(&self.title)
        );
        let _ = write!(
            s,
            r##"<rect x="0" y="0" width="{w}" height="{h}" fill="#ffffff"/><text x="{}" y="18" text-anchor="middle" class="pt">{}</text>"##,
            w / 2.0,
            esc(&self.title)
        );
        let _ = write!(
            s,
            r##"<rect x="{left}" y="{top}" width="{pw}" height="{ph}" fill="#fbfbfb" stroke="#888" stroke-width="1"/>"##
        );
        let (Some((x0, x1)), Some((y0, y1))) = (x_dom, y_dom) else {
            let _ = write!(
                s,
                r##"<text x="{}" y="{}" text-anchor="middle" class="pn">no data</text></svg>"##,
                left + pw / 2.0,
                top + ph / 2.0
            );
            return s;
        };
        let sx = |x: f64| left + (x - x0) / (x1 - x0) * pw;
        let sy = |y: f64| top + ph - (y - y0) / (y1 - y0) * ph;
        // Ticks and grid.
        for t in nice_ticks(y0, y1, 5) {
            let y = sy(t);
            let _ = write!(
                s,
                r##"<line x1="{left}" x2="{}" y1="{y:.1}" y2="{y:.1}" stroke="#e2e2e2"/><text x="{}" y="{:.1}" text-anchor="end" class="tk">{}</text>"##,
                left + pw,
                left - 4.0,
                y + 3.5,
                fmt_tick(t, y1 - y0)
            );
        }
        match categorical {
            Some(names) => {
                let step = (names.len() as f64 / (pw / 28.0)).ceil().max(1.0) as usize;
                for (i, name) in names.iter().enumerate().step_by(step) {
                    let x = sx(i as f64);
                    let _ = write!(
                        s,
                        r#"<text x="{x:.1}" y="{}" text-anchor="middle" class="tk">{}</text>"#,
                        top + ph + 13.0,
                        esc(name)
                    );
                }
            }
            None => {
                for t in nice_ticks(x0, x1, 6) {
                    let x = sx(t);
                    let _ = write!(
                        s,
                        r##"<line x1="{x:.1}" x2="{x:.1}" y1="{top}" y2="{}" stroke="#e2e2e2"/><text x="{x:.1}" y="{}" text-anchor="middle" class="tk">{}</text>"##,
                        top + ph,
                        top + ph + 13.0,
                        fmt_tick(t, x1 - x0)
                    );
                }
            }
        }
        let _ = write!(
            s,
            r#"<text x="{}" y="{}" text-anchor="middle" class="al">{}</text>"#,
            left + pw / 2.0,
            top + ph + 30.0,
            esc(&self.x_label)
        );
        let _ = write!(
            s,
            r#"<text transform="translate(14 {}) rotate(-90)" text-anchor="middle" class="al">{}</text>"#,
            top + ph / 2.0,
            esc(&self.y_label)
        );
        // Layers, clipped to the plot area.
        let clip = format!("c{:x}", fnv(&self.title) ^ fnv(&self.y_label));
        let _ = write!(
            s,
            r#"<clipPath id="{clip}"><rect x="{left}" y="{top}" width="{pw}" height="{ph}"/></clipPath><g clip-path="url(#{clip})">"#
        );
        for layer in &self.layers {
            match layer {
                Layer::Bars {
                    bars,
                    color,
                    opacity,
                    ..
                } => {
                    for &(a, b, v) in bars
                        .iter()
                        .filter(|b| b.0.is_finite() && b.1.is_finite() && b.2.is_finite())
                    {
                        let (xa, xb) = (sx(a), sx(b));
                        let (ya, yb) = (sy(v.max(y0)), sy(0f64.max(y0)));
                        let _ = write!(
                            s,
                            r#"<rect x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}" fill="{color}" fill-opacity="{opacity}"/>"#,
                            xa.min(xb),
                            ya.min(yb),
                            (xb - xa).abs().max(0.5),
                            (yb - ya).abs()
                        );
                    }
                }
                Layer::Line {
                    points,
                    color,
                    dashed,
                    ..
                } => {
                    let pts: Vec<String> = points
                        .iter()
                        .filter(|p| p.0.is_finite() && p.1.is_finite())
                        .map(|&(x, y)| format!("{:.1},{:.1}", sx(x), sy(y)))
                        .collect();
                    if !pts.is_empty() {
                        let dash = if *dashed {
                            r#" stroke-dasharray="5 4""#
                        } else {
                            ""
                        };
                        let _ = write!(
                            s,
                            r#"<polyline points="{}" fill="none" stroke="{color}" stroke-width="1.6"{dash}/>"#,
                            pts.join(" ")
                        );
                    }
                }
                Layer::Scatter { points, color, .. } => {
                    for &(x, y) in points.iter().filter(|p| p.0.is_finite() && p.1.is_finite()) {
                        let _ = write!(
                            s,
                            r#"<circle cx="{:.1}" cy="{:.1}" r="2.2" fill="{color}" fill-opacity="0.6"/>"#,
                            sx(x),
                            sy(y)
                        );
                    }
                }
            }
        }
        s.push_str("</g>");
        // Legend below the axis label.
        let mut lx = left;
        let ly = h - 8.0;
        for (label, color) in legend {
            let _ = write!(
                s,
                r#"<rect x="{lx:.1}" y="{:.1}" width="10" height="10" fill="{color}"/><text x="{:.1}" y="{ly:.1}" class="lg">{}</text>"#,
                ly - 9.0,
                lx + 14.0,
                esc(label)
            );
            lx += 24.0 + 6.5 * label.chars().count() as f64;
        }
        s.push_str("</svg>");
        s
    }
}

/// A reliability diagram: observed frequency against predicted probability
/// per bin (`(lo, hi, mean_predicted, observed, count)`), with the diagonal.
pub fn reliability(title: &str, bins: &[(f64, f64, f64, f64, u64)]) -> Plot {
    let bars: Vec<(f64, f64, f64)> = bins
        .iter()
        .filter(|b| b.4 > 0)
        .map(|b| (b.0, b.1, b.3))
        .collect();
    let points: Vec<(f64, f64)> = bins
        .iter()
        .filter(|b| b.4 > 0)
        .map(|b| (b.2, b.3))
        .collect();
    Plot::new(
        title,
        "predicted confidence",
        "observed share within tolerance",
    )
    .x_range(0.0, 1.0)
    .y_range(0.0, 1.0)
    .bars("observed", bars, PALETTE[0], 0.45)
    .dashed(
        "perfect calibration",
        vec![(0.0, 0.0), (1.0, 1.0)],
        "#555555",
    )
    .scatter("bin mean", points, PALETTE[1])
}

/// Histogram of `values` with `bins` equal bins over `[lo, hi]` (values
/// outside are clamped into the end bins); returns (edges, counts).
pub fn histogram(values: &[f64], lo: f64, hi: f64, bins: usize) -> (Vec<f64>, Vec<f64>) {
    let bins = bins.max(1);
    let (lo, hi) = if hi > lo {
        (lo, hi)
    } else {
        (lo - 0.5, lo + 0.5)
    };
    let edges: Vec<f64> = (0..=bins)
        .map(|i| lo + (hi - lo) * i as f64 / bins as f64)
        .collect();
    let mut counts = vec![0.0; bins];
    for &v in values.iter().filter(|v| v.is_finite()) {
        let i = (((v - lo) / (hi - lo)) * bins as f64).floor();
        counts[(i.max(0.0) as usize).min(bins - 1)] += 1.0;
    }
    (edges, counts)
}

#[derive(Default)]
struct Range(Option<(f64, f64)>);

impl Range {
    fn add(&mut self, v: f64) {
        self.0 = Some(match self.0 {
            None => (v, v),
            Some((a, b)) => (a.min(v), b.max(v)),
        });
    }
    fn get(&self) -> Option<(f64, f64)> {
        self.0
    }
}

/// Widens a data range a little (and to a non-zero span).
fn pad(a: f64, b: f64, keep_zero: bool) -> (f64, f64) {
    if b - a <= f64::EPSILON * a.abs().max(1.0) {
        let d = if a == 0.0 { 1.0 } else { a.abs() * 0.1 };
        return (a - d, b + d);
    }
    let m = (b - a) * 0.05;
    let lo = if keep_zero && a == 0.0 { 0.0 } else { a - m };
    (lo, b + m)
}

/// Ticks at 1, 2 or 5 times a power of ten, about `target` of them, inside `[lo, hi]`.
pub fn nice_ticks(lo: f64, hi: f64, target: usize) -> Vec<f64> {
    if !(lo.is_finite() && hi.is_finite()) || hi <= lo {
        return Vec::new();
    }
    let raw = (hi - lo) / target.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    (first..=last).map(|i| i as f64 * step).collect()
}

/// Formats a tick value with as many decimals as the span needs.
fn fmt_tick(v: f64, span: f64) -> String {
    let v = if v.abs() < span * 1e-9 { 0.0 } else { v };
    if v != 0.0 && (v.abs() >= 1e5 || v.abs() < 1e-3) {
        return format!("{v:.1e}");
    }
    let decimals = (-(span / 5.0).log10().floor()).clamp(0.0, 6.0) as usize;
    format!("{v:.decimals$}")
}

/// Escapes text for XML/HTML content and attributes.
pub fn esc(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            c => out.push(c),
        }
    }
    out
}

fn fnv(s: &str) -> u64 {
    s.bytes().fold(0xcbf29ce484222325u64, |h, b| {
        (h ^ b as u64).wrapping_mul(0x100000001b3)
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_numbers_inside_the_range() {
        assert_eq!(
            nice_ticks(0.0, 1.0, 5),
            vec![0.0, 0.2, 0.4, 0.6000000000000001, 0.8, 1.0]
        );
        let t = nice_ticks(-3.2, 17.9, 5);
        assert_eq!(t.first(), Some(&0.0));
        assert_eq!(t.last(), Some(&15.0));
        assert!(nice_ticks(1.0, 1.0, 5).is_empty());
    }

    #[test]
    fn histogram_counts_every_finite_value() {
        let (e, c) = histogram(&[0.0, 0.1, 0.5, 0.99, 1.0, 7.0, f64::NAN], 0.0, 1.0, 4);
        assert_eq!(e.len(), 5);
        assert_eq!(c, vec![2.0, 0.0, 1.0, 3.0]);
    }

    #[test]
    fn empty_plot_says_no_data() {
        let svg = Plot::new("t", "x", "y").to_svg();
        assert!(svg.contains("no data") && svg.ends_with("</svg>"));
    }

    #[test]
    fn plot_escapes_text_and_draws_layers() {
        let svg = Plot::new("a < b", "x (s)", "y")
            .line("l", vec![(0.0, 1.0), (1.0, 2.0)], PALETTE[0])
            .scatter("", vec![(0.5, f64::NAN), (0.5, 1.5)], PALETTE[1])
            .to_svg();
        assert!(svg.contains("a &lt; b"));
        assert!(svg.contains("<polyline"));
        assert_eq!(svg.matches("<circle").count(), 1);
    }
}
