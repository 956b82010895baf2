//! A small SVG plotting helper for the fit report: linear and logarithmic
//! axes with tick marks, polylines, shaded bands, points, reference lines
//! and labels. Output is plain SVG text styled by CSS classes that the
//! report's inline stylesheet defines, so the palette lives in one place.
//!
//! Every piece of text written here goes through [`escape`].

use std::fmt::Write as _;

/// Escapes text for HTML and SVG content and attribute values.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
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

/// How data values map onto an axis.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Scale {
    /// `step` is the tick spacing; `lo` and `hi` are multiples of it.
    Linear { lo: f64, hi: f64, step: f64 },
    /// `lo` and `hi` are positive.
    Log { lo: f64, hi: f64 },
}

impl Scale {
    /// A linear scale covering `[lo, hi]`, widened to whole tick steps so
    /// the extreme data sit on or inside the first and last tick.
    pub fn linear(lo: f64, hi: f64) -> Scale {
        let (lo, hi) = widen_degenerate(lo, hi);
        let step = nice_step(hi - lo, TARGET_TICKS);
        Scale::Linear {
            lo: clean((lo / step).floor() * step, step),
            hi: clean((hi / step).ceil() * step, step),
            step,
        }
    }

    /// A logarithmic scale covering `[lo, hi]` (both positive), widened to
    /// whole decades.
    pub fn log(lo: f64, hi: f64) -> Scale {
        // Nothing positive to show still needs a usable axis.
        let hi = if hi.is_finite() && hi > 0.0 { hi } else { 10.0 };
        let lo = if lo.is_finite() && lo > 0.0 {
            lo.min(hi)
        } else {
            hi / 10.0
        };
        let lo_e = lo.log10().floor() as i32;
        let mut hi_e = hi.log10().ceil() as i32;
        if hi_e <= lo_e {
            hi_e = lo_e + 1;
        }
        Scale::Log {
            lo: pow10(lo_e),
            hi: pow10(hi_e),
        }
    }

    /// The position of `v` as a fraction of the axis, 0 at `lo`, 1 at `hi`.
    pub fn fraction(&self, v: f64) -> f64 {
        match *self {
            Scale::Linear { lo, hi, .. } => (v - lo) / (hi - lo),
            Scale::Log { lo, hi } => (v.log10() - lo.log10()) / (hi.log10() - lo.log10()),
        }
    }

    /// Whether `v` can be drawn on this scale at all.
    pub fn accepts(&self, v: f64) -> bool {
        match self {
            Scale::Linear { .. } => v.is_finite(),
            Scale::Log { .. } => v.is_finite() && v > 0.0,
        }
    }

    pub fn ticks(&self) -> Vec<f64> {
        match *self {
            Scale::Linear { lo, hi, step } => multiples(lo, hi, step),
            Scale::Log { lo, hi } => log_ticks(lo, hi),
        }
    }

    /// The ends of the axis.
    pub fn bounds(&self) -> (f64, f64) {
        match *self {
            Scale::Linear { lo, hi, .. } | Scale::Log { lo, hi } => (lo, hi),
        }
    }

    pub fn is_log(&self) -> bool {
        matches!(self, Scale::Log { .. })
    }
}

/// About this many ticks on a linear axis.
const TARGET_TICKS: usize = 5;

/// A zero-width range gets a unit of room so the scale stays defined.
fn widen_degenerate(lo: f64, hi: f64) -> (f64, f64) {
    if !(lo.is_finite() && hi.is_finite()) {
        (0.0, 1.0)
    } else if hi > lo {
        (lo, hi)
    } else {
        let pad = if lo == 0.0 { 1.0 } else { lo.abs() * 0.1 };
        (lo - pad, hi + pad)
    }
}

/// A "nice" tick step, 1, 2 or 5 times a power of ten, giving about
/// `target` intervals over `span` (Heckbert, "Nice numbers for graph
/// labels", Graphics Gems, 1990: the rounding variant).
pub fn nice_step(span: f64, target: usize) -> f64 {
    let raw = span / target.max(1) as f64;
    let e = raw.log10().floor() as i32;
    let f = raw / pow10(e);
    let nice = if f < 1.5 {
        1.0
    } else if f < 3.0 {
        2.0
    } else if f < 7.0 {
        5.0
    } else {
        10.0
    };
    nice * pow10(e)
}

/// Multiples of the nice step inside `[lo, hi]`.
pub fn linear_ticks(lo: f64, hi: f64, target: usize) -> Vec<f64> {
    let (lo, hi) = widen_degenerate(lo, hi);
    multiples(lo, hi, nice_step(hi - lo, target))
}

/// The multiples of `step` inside `[lo, hi]`.
fn multiples(lo: f64, hi: f64, step: f64) -> Vec<f64> {
    // A small tolerance keeps ticks that sit on the ends despite rounding.
    let tol = step * 1e-9;
    let first = ((lo - tol) / step).ceil() as i64;
    let last = ((hi + tol) / step).floor() as i64;
    (first..=last)
        .map(|i| clean(i as f64 * step, step))
        .collect()
}

/// Decades inside `[lo, hi]`; when at most three decades fit, the 2 and
/// 5 multiples too, so a short log axis still has enough labels; when more
/// than eight, every second or third decade so labels do not crowd.
pub fn log_ticks(lo: f64, hi: f64) -> Vec<f64> {
    if !(lo > 0.0 && hi > lo) {
        return Vec::new();
    }
    let lo_e = (lo.log10() - 1e-9).ceil() as i32;
    let hi_e = (hi.log10() + 1e-9).floor() as i32;
    let decades = (hi_e - lo_e + 1).max(0) as usize;
    if decades <= 3 {
        let mut ticks = Vec::new();
        for e in (lo_e - 1)..=(hi_e) {
            for m in [1.0, 2.0, 5.0] {
                let v = clean(m * pow10(e), pow10(e));
                if v >= lo * (1.0 - 1e-9) && v <= hi * (1.0 + 1e-9) {
                    ticks.push(v);
                }
            }
        }
        return ticks;
    }
    let stride = decades.div_ceil(8) as i32;
    (lo_e..=hi_e)
        .filter(|e| (e - lo_e) % stride == 0)
        .map(pow10)
        .collect()
}

/// 10^e, correctly rounded (repeated multiplication is not for e < 0).
fn pow10(e: i32) -> f64 {
    format!("1e{e}").parse().unwrap_or(f64::NAN)
}

/// Rounds `v` to the decimals that `step` implies, so 0.1 × 3 prints and
/// compares as 0.3.
fn clean(v: f64, step: f64) -> f64 {
    let decimals = (-step.log10().floor()).max(0.0) as usize;
    format!("{v:.decimals$}").parse().unwrap_or(v)
}

/// Whether a grid is better shown on a log axis: all values positive,
/// spanning at least a factor of ten, and more evenly spaced in ratio than
/// in difference (the signature of a geometric grid).
pub fn is_logarithmic(values: &[f64]) -> bool {
    let mut xs: Vec<f64> = values.iter().copied().filter(|v| v.is_finite()).collect();
    xs.sort_by(f64::total_cmp);
    xs.dedup();
    if xs.len() < 2 || xs[0] <= 0.0 || xs[xs.len() - 1] / xs[0] < 10.0 {
        return false;
    }
    if xs.len() == 2 {
        return true;
    }
    let spread = |steps: Vec<f64>| {
        let max = steps.iter().copied().fold(f64::MIN, f64::max);
        let min = steps.iter().copied().fold(f64::MAX, f64::min);
        max / min
    };
    let ratios = xs.windows(2).map(|w| (w[1] / w[0]).ln()).collect();
    let diffs = xs.windows(2).map(|w| w[1] - w[0]).collect();
    spread(ratios) <= spread(diffs)
}

/// A tick label: plain decimals in the usual range, exponent form outside.
pub fn tick_label(v: f64) -> String {
    if v == 0.0 {
        return "0".to_string();
    }
    let a = v.abs();
    if !(1e-3..1e5).contains(&a) {
        format!("{v:e}")
    } else {
        // Shortest round-trip form: ticks are already cleaned.
        format!("{v}")
    }
}

/// The pixel frame of a plot.
const WIDTH: f64 = 560.0;
const HEIGHT: f64 = 360.0;
const LEFT: f64 = 64.0;
const RIGHT: f64 = 28.0;
const TOP: f64 = 30.0;
const BOTTOM: f64 = 50.0;

/// One plot being drawn: two scales and the SVG elements so far.
#[derive(Debug)]
pub struct Plot {
    pub x: Scale,
    pub y: Scale,
    body: String,
}

impl Plot {
    pub fn new(x: Scale, y: Scale) -> Plot {
        Plot {
            x,
            y,
            body: String::new(),
        }
    }

    fn px(&self, x: f64) -> f64 {
        LEFT + self.x.fraction(x) * (WIDTH - LEFT - RIGHT)
    }

    fn py(&self, y: f64) -> f64 {
        HEIGHT - BOTTOM - self.y.fraction(y) * (HEIGHT - TOP - BOTTOM)
    }

    fn drawable(&self, (x, y): (f64, f64)) -> bool {
        self.x.accepts(x) && self.y.accepts(y)
    }

    /// The frame, tick marks with labels, and axis titles.
    pub fn axes(&mut self, x_title: &str, y_title: &str) {
        let (x0, x1) = (LEFT, WIDTH - RIGHT);
        let (y0, y1) = (HEIGHT - BOTTOM, TOP);
        let mut s = String::new();
        let _ = write!(
            s,
            r#"<rect class="frame" x="{x0:.1}" y="{y1:.1}" width="{:.1}" height="{:.1}"/>"#,
            x1 - x0,
            y0 - y1
        );
        for t in self.x.ticks() {
            let x = self.px(t);
            let _ = write!(
                s,
                r#"<line class="grid" x1="{x:.1}" y1="{y1:.1}" x2="{x:.1}" y2="{y0:.1}"/><text class="tick" x="{x:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
                y0 + 16.0,
                escape(&tick_label(t))
            );
        }
        for t in self.y.ticks() {
            let y = self.py(t);
            let _ = write!(
                s,
                r#"<line class="grid" x1="{x0:.1}" y1="{y:.1}" x2="{x1:.1}" y2="{y:.1}"/><text class="tick" x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#,
                x0 - 6.0,
                y + 4.0,
                escape(&tick_label(t))
            );
        }
        let _ = write!(
            s,
            r#"<text class="axis-title" x="{:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            (x0 + x1) / 2.0,
            HEIGHT - 10.0,
            escape(x_title)
        );
        let (cx, cy) = (16.0, (y0 + y1) / 2.0);
        let _ = write!(
            s,
            r#"<text class="axis-title" x="{cx:.1}" y="{cy:.1}" text-anchor="middle" transform="rotate(-90 {cx:.1} {cy:.1})">{}</text>"#,
            escape(y_title)
        );
        self.body.push_str(&s);
    }

    fn coords(&self, points: &[(f64, f64)]) -> String {
        points
            .iter()
            .filter(|p| self.drawable(**p))
            .map(|&(x, y)| format!("{:.1},{:.1}", self.px(x), self.py(y)))
            .collect::<Vec<_>>()
            .join(" ")
    }

    /// A line through the drawable points, in order.
    pub fn polyline(&mut self, points: &[(f64, f64)], class: &str) {
        let c = self.coords(points);
        if !c.is_empty() {
            let _ = write!(
                self.body,
                r#"<polyline class="{}" points="{c}"/>"#,
                escape(class)
            );
        }
    }

    /// A shaded band between two curves over the same x values.
    pub fn band(&mut self, lower: &[(f64, f64)], upper: &[(f64, f64)], class: &str) {
        let mut outline: Vec<(f64, f64)> = upper.to_vec();
        outline.extend(lower.iter().rev());
        let c = self.coords(&outline);
        if !c.is_empty() {
            let _ = write!(
                self.body,
                r#"<polygon class="{}" points="{c}"/>"#,
                escape(class)
            );
        }
    }

    /// Circles of radius `r` pixels at the drawable points.
    pub fn points(&mut self, points: &[(f64, f64)], r: f64, class: &str) {
        let class = escape(class);
        let mut s = String::new();
        for &p in points.iter().filter(|p| self.drawable(**p)) {
            let _ = write!(
                s,
                r#"<circle class="{class}" cx="{:.1}" cy="{:.1}" r="{r:.1}"/>"#,
                self.px(p.0),
                self.py(p.1)
            );
        }
        self.body.push_str(&s);
    }

    /// A straight segment between two data points.
    pub fn segment(&mut self, a: (f64, f64), b: (f64, f64), class: &str) {
        if self.drawable(a) && self.drawable(b) {
            let _ = write!(
                self.body,
                r#"<line class="{}" x1="{:.1}" y1="{:.1}" x2="{:.1}" y2="{:.1}"/>"#,
                escape(class),
                self.px(a.0),
                self.py(a.1),
                self.px(b.0),
                self.py(b.1)
            );
        }
    }

    /// A vertical line across the plot at `x`, labelled at the top.
    pub fn vline(&mut self, x: f64, class: &str, label: &str) {
        if !self.x.accepts(x) {
            return;
        }
        let px = self.px(x);
        // Labels in the right half read leftwards so they stay in the frame.
        let (lx, anchor) = if self.x.fraction(x) > 0.5 {
            (px - 4.0, "end")
        } else {
            (px + 4.0, "start")
        };
        let _ = write!(
            self.body,
            r#"<line class="{}" x1="{px:.1}" y1="{TOP:.1}" x2="{px:.1}" y2="{:.1}"/><text class="note" x="{lx:.1}" y="{:.1}" text-anchor="{anchor}">{}</text>"#,
            escape(class),
            HEIGHT - BOTTOM,
            TOP + 12.0,
            escape(label)
        );
    }

    /// An axis-aligned rectangle between two data corners.
    pub fn rect(&mut self, a: (f64, f64), b: (f64, f64), class: &str) {
        if !(self.drawable(a) && self.drawable(b)) {
            return;
        }
        let (xa, xb) = (self.px(a.0), self.px(b.0));
        let (ya, yb) = (self.py(a.1), self.py(b.1));
        let _ = write!(
            self.body,
            r#"<rect class="{}" x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}"/>"#,
            escape(class),
            xa.min(xb),
            ya.min(yb),
            (xb - xa).abs(),
            (yb - ya).abs()
        );
    }

    /// A legend in the top-left corner: one swatch per (class, label), on
    /// a pale panel so data underneath does not muddle it.
    pub fn legend(&mut self, entries: &[(&str, &str)]) {
        if entries.is_empty() {
            return;
        }
        // Width from the longest label at about 6.2 px per character of
        // the 11 px legend font.
        let chars = entries
            .iter()
            .map(|(_, l)| l.chars().count())
            .max()
            .unwrap_or(0);
        let _ = write!(
            self.body,
            r#"<rect class="legend-panel" x="{:.1}" y="{:.1}" width="{:.1}" height="{:.1}"/>"#,
            LEFT + 4.0,
            TOP + 2.0,
            30.0 + 6.2 * chars as f64,
            8.0 + 16.0 * entries.len() as f64
        );
        for (i, (class, label)) in entries.iter().enumerate() {
            let y = TOP + 14.0 + 16.0 * i as f64;
            let _ = write!(
                self.body,
                r#"<rect class="{}" x="{:.1}" y="{:.1}" width="10" height="10"/><text class="legend" x="{:.1}" y="{:.1}">{}</text>"#,
                escape(class),
                LEFT + 10.0,
                y - 9.0,
                LEFT + 26.0,
                y,
                escape(label)
            );
        }
    }

    /// The finished `<svg>` element with an accessible title.
    pub fn finish(self, title: &str) -> String {
        let t = escape(title);
        format!(
            r#"<svg xmlns="http://www.w3.org/2000/svg" class="plot" viewBox="0 0 {WIDTH} {HEIGHT}" width="{WIDTH}" height="{HEIGHT}" role="img" aria-label="{t}"><title>{t}</title>{}</svg>"#,
            self.body
        )
    }
}
