//! Small inline-SVG building blocks for the comparison page: scales, axes,
//! markers, number formatting and escaping. No layout engine, no fonts:
//! text is left to the browser's default sans-serif.

use std::fmt::Write as _;

/// Escape text for HTML and SVG content and attribute values.
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

/// A relative error with three significant digits, `1.46e-1` (the form the
/// terminal tables use); `—` for a missing or non-finite value.
pub fn sci(v: Option<f64>) -> String {
    match v {
        Some(0.0) => "0".to_string(),
        Some(x) if x.is_finite() => format!("{x:.2e}"),
        _ => "—".to_string(),
    }
}

/// The exact value for a `data-value` attribute: Rust's shortest
/// round-tripping decimal, empty when missing.
pub fn exact(v: Option<f64>) -> String {
    match v {
        Some(x) if x.is_finite() => format!("{x}"),
        _ => String::new(),
    }
}

/// A base-10 logarithmic axis over whole decades.
#[derive(Clone, Copy, Debug)]
pub struct LogScale {
    /// Lowest decade exponent.
    pub lo: i32,
    /// Highest decade exponent (> `lo`).
    pub hi: i32,
    /// Pixel of `10^lo`.
    pub p0: f64,
    /// Pixel of `10^hi`.
    pub p1: f64,
}

impl LogScale {
    /// The decades covering every positive finite value in `values`
    /// (`10⁻⁴ … 10⁰` when there is none).
    pub fn covering(values: impl IntoIterator<Item = f64>, p0: f64, p1: f64) -> Self {
        let (mut min, mut max) = (f64::INFINITY, f64::NEG_INFINITY);
        for v in values {
            if v.is_finite() && v > 0.0 {
                min = min.min(v);
                max = max.max(v);
            }
        }
        let (mut lo, mut hi) = if min.is_finite() {
            (min.log10().floor() as i32, max.log10().ceil() as i32)
        } else {
            (-4, 0)
        };
        if hi <= lo {
            hi = lo + 1;
        }
        // Keep a visible margin when a value sits exactly on a decade.
        if min.is_finite() && (min.log10() - f64::from(lo)).abs() < 1e-9 {
            lo -= 1;
        }
        LogScale { lo, hi, p0, p1 }
    }

    /// Pixel of `v`; zero and values below the axis sit at its floor.
    pub fn px(&self, v: f64) -> f64 {
        let e = if v > 0.0 { v.log10() } else { f64::from(self.lo) };
        let t = (e - f64::from(self.lo)) / f64::from(self.hi - self.lo);
        self.p0 + t.clamp(0.0, 1.0) * (self.p1 - self.p0)
    }

    /// Decade exponents, `lo..=hi`.
    pub fn decades(&self) -> impl Iterator<Item = i32> {
        self.lo..=self.hi
    }

    /// Minor ticks `k·10^e`, k = 2…9, inside the axis.
    pub fn minors(&self) -> Vec<f64> {
        let mut v = Vec::new();
        for e in self.lo..self.hi {
            for k in 2..10 {
                v.push(f64::from(k) * 10f64.powi(e));
            }
        }
        v
    }
}

/// A linear axis.
#[derive(Clone, Copy, Debug)]
pub struct LinScale {
    /// Domain start.
    pub d0: f64,
    /// Domain end (≠ `d0`).
    pub d1: f64,
    /// Pixel of `d0`.
    pub p0: f64,
    /// Pixel of `d1`.
    pub p1: f64,
}

impl LinScale {
    /// Pixel of `v`.
    pub fn px(&self, v: f64) -> f64 {
        self.p0 + (v - self.d0) / (self.d1 - self.d0) * (self.p1 - self.p0)
    }
}

/// `10` with a raised exponent, as SVG text content.
pub fn decade_label(e: i32) -> String {
    if e == 0 {
        return "1".to_string();
    }
    // A raised, smaller exponent; U+2212 is the typographic minus.
    let exp = if e < 0 { format!("\u{2212}{}", -e) } else { e.to_string() };
    format!("10<tspan dy=\"-6\" font-size=\"9\">{exp}</tspan>")
}

/// Marker shapes, in the order series get them.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Shape {
    /// ●
    Circle,
    /// ■
    Square,
    /// ▲
    Triangle,
    /// ◆
    Diamond,
    /// ▼
    TriangleDown,
}

/// A marker of `shape` centred on `(x, y)`, `r` pixels in radius; `extra`
/// is spliced into the element's attributes (classes, data, title is added
/// by the caller as a child where wanted).
#[allow(clippy::too_many_arguments)]
pub fn marker(
    out: &mut String,
    shape: Shape,
    x: f64,
    y: f64,
    r: f64,
    colour: &str,
    filled: bool,
    extra: &str,
    title: Option<&str>,
) {
    let fill = if filled { colour } else { "#fff" };
    let paint = format!("fill=\"{fill}\" stroke=\"{colour}\" stroke-width=\"1.6\" {extra}");
    let title = title.map(|t| format!("<title>{}</title>", esc(t))).unwrap_or_default();
    let close = |tag: &str| {
        if title.is_empty() {
            "/>".to_string()
        } else {
            format!(">{title}</{tag}>")
        }
    };
    match shape {
        Shape::Circle => {
            let _ = write!(
                out,
                "<circle cx=\"{x:.1}\" cy=\"{y:.1}\" r=\"{:.1}\" {paint}{}",
                r * 0.9,
                close("circle")
            );
        }
        Shape::Square => {
            let s = r * 0.8;
            let _ = write!(
                out,
                "<rect x=\"{:.1}\" y=\"{:.1}\" width=\"{:.1}\" height=\"{:.1}\" {paint}{}",
                x - s,
                y - s,
                2.0 * s,
                2.0 * s,
                close("rect")
            );
        }
        Shape::Triangle | Shape::TriangleDown | Shape::Diamond => {
            let pts: Vec<(f64, f64)> = match shape {
                Shape::Triangle => vec![(0.0, -1.15), (1.0, 0.6), (-1.0, 0.6)],
                Shape::TriangleDown => vec![(0.0, 1.15), (1.0, -0.6), (-1.0, -0.6)],
                _ => vec![(0.0, -1.2), (1.0, 0.0), (0.0, 1.2), (-1.0, 0.0)],
            };
            let p: Vec<String> =
                pts.iter().map(|(dx, dy)| format!("{:.1},{:.1}", x + dx * r, y + dy * r)).collect();
            let _ = write!(out, "<polygon points=\"{}\" {paint}{}", p.join(" "), close("polygon"));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn log_scale_covers_values_in_whole_decades() {
        let s = LogScale::covering([3e-4, 0.2, 0.0, f64::NAN], 100.0, 0.0);
        assert_eq!((s.lo, s.hi), (-4, 0));
        assert!((s.px(1e-4) - 100.0).abs() < 1e-9 && s.px(1.0).abs() < 1e-9);
        assert!((s.px(1e-2) - 50.0).abs() < 1e-9);
        // Zero sits on the floor instead of escaping the plot.
        assert_eq!(s.px(0.0), 100.0);
        // A value exactly on a decade gets a decade of room below it.
        let t = LogScale::covering([0.01, 0.05], 0.0, 1.0);
        assert_eq!((t.lo, t.hi), (-3, -1));
        assert_eq!(t.minors().len(), 16);
    }

    #[test]
    fn formats() {
        assert_eq!(sci(Some(0.146)), "1.46e-1");
        assert_eq!(sci(None), "—");
        assert_eq!(exact(Some(0.1 + 0.2)), "0.30000000000000004");
        assert_eq!(esc("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
        assert!(decade_label(-3).contains("\u{2212}3"));
    }
}
