//! Small SVG helpers: escaping, number formatting, tick choice, linear scales.
//! Everything is written by hand; styles live in the page's CSS classes so
//! each element stays short.

use std::fmt::Write as _;

/// Escapes text for HTML and SVG (element content and attribute values).
pub fn esc(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for c in s.chars() {
        match c {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            _ => o.push(c),
        }
    }
    o
}

/// A coordinate with one decimal, no `-0`, no trailing `.0`.
pub fn pt(v: f64) -> String {
    let r = (v * 10.0).round() / 10.0;
    let r = if r == 0.0 { 0.0 } else { r };
    if r.fract() == 0.0 {
        format!("{r:.0}")
    } else {
        format!("{r:.1}")
    }
}

/// A tick value on an axis with ticks `step` apart.
pub fn tick(v: f64, step: f64) -> String {
    let decimals = if step >= 1.0 {
        0
    } else {
        (-step.log10()).ceil().clamp(0.0, 6.0) as usize
    };
    let s = format!("{v:.decimals$}");
    if s.trim_start_matches('-')
        .chars()
        .all(|c| c == '0' || c == '.')
    {
        "0".to_string()
    } else {
        s
    }
}

/// A number to about three significant figures, for labels.
pub fn sig(v: f64) -> String {
    let a = v.abs();
    if !v.is_finite() {
        return "–".to_string();
    }
    if a == 0.0 {
        "0".to_string()
    } else if !(1e-3..1e5).contains(&a) {
        format!("{v:.2e}")
    } else if a >= 100.0 {
        format!("{v:.0}")
    } else if a >= 10.0 {
        format!("{v:.1}")
    } else if a >= 1.0 {
        format!("{v:.2}")
    } else {
        format!("{v:.3}")
    }
}

/// A count with thin spaces between thousands (`28 800`).
pub fn count(n: u64) -> String {
    let s = n.to_string();
    let mut o = String::new();
    for (i, ch) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            o.push('\u{202f}');
        }
        o.push(ch);
    }
    o
}

/// About `n` round tick values covering `[lo, hi]` (steps 1, 2 or 5 × 10^k),
/// all inside the interval.
pub fn nice_ticks(lo: f64, hi: f64, n: usize) -> (Vec<f64>, f64) {
    if !(hi > lo) || !lo.is_finite() || !hi.is_finite() {
        return (vec![lo], 1.0);
    }
    let raw = (hi - lo) / n.max(1) as f64;
    let mag = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .iter()
        .map(|m| m * mag)
        .find(|s| *s >= raw)
        .unwrap_or(10.0 * mag);
    let first = (lo / step).ceil() as i64;
    let last = (hi / step).floor() as i64;
    let ticks = (first..=last).map(|i| i as f64 * step).collect();
    (ticks, step)
}

/// A linear map from data to SVG units.
#[derive(Debug, Clone, Copy)]
pub struct Scale {
    pub d0: f64,
    pub d1: f64,
    pub p0: f64,
    pub p1: f64,
}

impl Scale {
    pub fn new(d0: f64, d1: f64, p0: f64, p1: f64) -> Self {
        let d1 = if d1 > d0 { d1 } else { d0 + 1.0 };
        Scale { d0, d1, p0, p1 }
    }

    pub fn at(&self, v: f64) -> f64 {
        self.p0 + (v - self.d0) / (self.d1 - self.d0) * (self.p1 - self.p0)
    }

    /// Like [`Scale::at`], clamped to the range.
    pub fn clamped(&self, v: f64) -> f64 {
        let (a, b) = if self.p0 < self.p1 {
            (self.p0, self.p1)
        } else {
            (self.p1, self.p0)
        };
        self.at(v).clamp(a, b)
    }
}

/// `<text>` with a class and an anchor.
pub fn text(out: &mut String, x: f64, y: f64, class: &str, anchor: &str, body: &str) {
    let _ = write!(out, r#"<text x="{}" y="{}" class="{class}""#, pt(x), pt(y));
    if anchor != "start" {
        let _ = write!(out, r#" text-anchor="{anchor}""#);
    }
    let _ = write!(out, ">{body}</text>");
}

/// A vertical `<text>` (axis titles), rotated about its anchor point.
pub fn vtext(out: &mut String, x: f64, y: f64, class: &str, body: &str) {
    let _ = write!(
        out,
        r#"<text x="{0}" y="{1}" class="{class}" text-anchor="middle" transform="rotate(-90 {0} {1})">{body}</text>"#,
        pt(x),
        pt(y)
    );
}

/// A straight line.
pub fn line(out: &mut String, x1: f64, y1: f64, x2: f64, y2: f64, class: &str) {
    let _ = write!(
        out,
        r#"<path class="{class}" d="M{} {}L{} {}"/>"#,
        pt(x1),
        pt(y1),
        pt(x2),
        pt(y2)
    );
}

/// An axis-aligned rectangle.
pub fn rect(out: &mut String, x: f64, y: f64, w: f64, h: f64, class: &str) {
    let _ = write!(
        out,
        r#"<rect class="{class}" x="{}" y="{}" width="{}" height="{}"/>"#,
        pt(x),
        pt(y),
        pt(w.max(0.0)),
        pt(h.max(0.0))
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn formats_and_ticks() {
        assert_eq!(pt(-0.04), "0");
        assert_eq!(pt(12.25), "12.3");
        assert_eq!(pt(3.0), "3");
        assert_eq!(esc("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
        assert_eq!(count(28800), "28\u{202f}800");
        assert_eq!(count(999), "999");
        let (t, s) = nice_ticks(0.0, 8000.0, 8);
        assert_eq!(s, 1000.0);
        assert_eq!(t.len(), 9);
        let (t, s) = nice_ticks(-2.6, 14.0, 6);
        assert_eq!(s, 5.0);
        assert_eq!(t, vec![0.0, 5.0, 10.0]);
        assert_eq!(tick(0.30000000000000004, 0.1), "0.3");
        assert_eq!(tick(-0.0, 0.5), "0");
        assert_eq!(sig(0.0123), "0.012");
        assert_eq!(sig(1234.0), "1234");
    }
}
