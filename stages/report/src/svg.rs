//! Hand-built SVG figures: axes with round-number ticks, lines, bands,
//! bars and dots. Every figure is well-formed XML with its own viewBox, so
//! it scales with the page and prints in black and white: data are drawn
//! in ink and greys, with one accent colour used only beside a shape or
//! dash pattern that tells the same thing.

use std::fmt::Write;

/// Ink for data and text.
pub const INK: &str = "#1d232a";
/// The one accent: thresholds, fits and markers (always with a dash or shape too).
pub const ACCENT: &str = "#a4461b";
/// Light grey for bands and grid.
pub const PALE: &str = "#d9dcdf";

/// Escape text for XML content and attributes.
pub fn escape(text: &str) -> String {
    let mut out = String::with_capacity(text.len());
    for c in text.chars() {
        match c {
            '&' => out.push_str("&amp;"),
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '"' => out.push_str("&quot;"),
            '\'' => out.push_str("&#39;"),
            _ => out.push(c),
        }
    }
    out
}

/// A number short enough for a tick label.
pub fn short(value: f64) -> String {
    if value == 0.0 {
        return "0".into();
    }
    let magnitude = value.abs();
    let text = if !(0.01..1000.0).contains(&magnitude) {
        format!("{value:.1e}")
    } else if magnitude >= 10.0 {
        format!("{value:.0}")
    } else if magnitude >= 1.0 {
        format!("{value:.1}")
    } else {
        format!("{value:.2}")
    };
    if text.contains('.') && !text.contains('e') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    }
}

/// Round-number ticks covering [low, high], about `count` of them.
pub fn ticks(low: f64, high: f64, count: usize) -> Vec<f64> {
    if !(low.is_finite() && high.is_finite()) || high <= low {
        return vec![low];
    }
    let raw = (high - low) / count.max(1) as f64;
    let power = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0].iter().map(|m| m * power).find(|s| *s >= raw).unwrap_or(10.0 * power);
    let first = (low / step).ceil() as i64;
    let last = (high / step).floor() as i64;
    (first..=last).map(|i| i as f64 * step).collect()
}

/// A figure with data coordinates mapped into a plotting area.
pub struct Plot {
    width: f64,
    height: f64,
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    x: (f64, f64),
    y: (f64, f64),
    body: String,
}

impl Plot {
    /// A `width`×`height` figure showing x in `x` and y in `y` (ranges are
    /// widened when empty).
    pub fn new(width: f64, height: f64, x: (f64, f64), y: (f64, f64)) -> Plot {
        let widen = |(a, b): (f64, f64)| {
            if !(a.is_finite() && b.is_finite()) {
                (0.0, 1.0)
            } else if b > a {
                (a, b)
            } else {
                (a - 0.5 * a.abs().max(1.0), b + 0.5 * b.abs().max(1.0))
            }
        };
        Plot {
            width,
            height,
            left: 46.0,
            right: 8.0,
            top: 8.0,
            bottom: 30.0,
            x: widen(x),
            y: widen(y),
            body: String::new(),
        }
    }

    pub fn px(&self, x: f64) -> f64 {
        self.left + (x - self.x.0) / (self.x.1 - self.x.0) * (self.width - self.left - self.right)
    }

    pub fn py(&self, y: f64) -> f64 {
        self.height - self.bottom - (y - self.y.0) / (self.y.1 - self.y.0) * (self.height - self.top - self.bottom)
    }

    /// Axes with ticks and labels.
    pub fn axes(&mut self, x_label: &str, y_label: &str) -> &mut Self {
        let (x0, x1, y0, y1) = (self.px(self.x.0), self.px(self.x.1), self.py(self.y.0), self.py(self.y.1));
        let mut s = String::new();
        let _ =
            write!(s, r#"<path d="M{x0:.1},{y1:.1}V{y0:.1}H{x1:.1}" fill="none" stroke="{INK}" stroke-width="1"/>"#);
        for t in ticks(self.x.0, self.x.1, 5) {
            let p = self.px(t);
            let _ = write!(
                s,
                r#"<path d="M{p:.1},{y0:.1}v4" stroke="{INK}"/><text x="{p:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
                y0 + 14.0,
                short(t)
            );
        }
        for t in ticks(self.y.0, self.y.1, 4) {
            let p = self.py(t);
            let _ = write!(
                s,
                r#"<path d="M{x0:.1},{p:.1}h-4" stroke="{INK}"/><text x="{:.1}" y="{:.1}" text-anchor="end">{}</text>"#,
                x0 - 6.0,
                p + 3.5,
                short(t)
            );
        }
        let _ = write!(
            s,
            r#"<text x="{:.1}" y="{:.1}" text-anchor="middle">{}</text>"#,
            0.5 * (x0 + x1),
            self.height - 3.0,
            escape(x_label)
        );
        let _ = write!(
            s,
            r#"<text transform="translate(11,{:.1}) rotate(-90)" text-anchor="middle">{}</text>"#,
            0.5 * (y0 + y1),
            escape(y_label)
        );
        self.body.push_str(&s);
        self
    }

    /// A polyline through the points (NaN points break it).
    pub fn line(&mut self, points: &[(f64, f64)], stroke: &str, width: f64, dash: Option<&str>) -> &mut Self {
        let mut d = String::new();
        let mut pen_down = false;
        for &(x, y) in points {
            if !(x.is_finite() && y.is_finite()) {
                pen_down = false;
                continue;
            }
            let _ = write!(d, "{}{:.1},{:.1}", if pen_down { 'L' } else { 'M' }, self.px(x), self.py(y));
            pen_down = true;
        }
        if !d.is_empty() {
            let dash = dash.map_or(String::new(), |p| format!(r#" stroke-dasharray="{p}""#));
            let _ = write!(self.body, r#"<path d="{d}" fill="none" stroke="{stroke}" stroke-width="{width}"{dash}/>"#);
        }
        self
    }

    /// A filled band between `low` and `high` at each x.
    pub fn band(&mut self, x: &[f64], low: &[f64], high: &[f64], fill: &str) -> &mut Self {
        if x.is_empty() {
            return self;
        }
        let mut d = String::new();
        for (i, (&xi, &hi)) in x.iter().zip(high).enumerate() {
            let _ = write!(d, "{}{:.1},{:.1}", if i == 0 { 'M' } else { 'L' }, self.px(xi), self.py(hi));
        }
        for (&xi, &lo) in x.iter().zip(low).rev() {
            let _ = write!(d, "L{:.1},{:.1}", self.px(xi), self.py(lo));
        }
        let _ = write!(self.body, r#"<path d="{d}Z" fill="{fill}" stroke="none"/>"#);
        self
    }

    /// Bars from y = 0: `counts[i]` over [start + i·width, start + (i+1)·width).
    pub fn bars(&mut self, start: f64, width: f64, counts: &[f64], fill: &str) -> &mut Self {
        let mut d = String::new();
        let base = self.py(0.0f64.max(self.y.0));
        for (i, &c) in counts.iter().enumerate().filter(|(_, c)| **c > 0.0) {
            let (a, b) = (self.px(start + i as f64 * width), self.px(start + (i + 1) as f64 * width));
            let _ = write!(d, "M{a:.1},{base:.1}V{:.1}H{b:.1}V{base:.1}Z", self.py(c));
        }
        if !d.is_empty() {
            let _ = write!(self.body, r#"<path d="{d}" fill="{fill}" stroke="{INK}" stroke-width="0.3"/>"#);
        }
        self
    }

    /// Small dots.
    pub fn dots(&mut self, points: &[(f64, f64)], radius: f64, fill: &str) -> &mut Self {
        let mut d = String::new();
        for &(x, y) in points.iter().filter(|p| p.0.is_finite() && p.1.is_finite()) {
            let _ = write!(d, "M{:.1},{:.1}h0.01", self.px(x), self.py(y));
        }
        if !d.is_empty() {
            let _ = write!(
                self.body,
                r#"<path d="{d}" stroke="{fill}" stroke-width="{:.1}" stroke-linecap="round"/>"#,
                2.0 * radius
            );
        }
        self
    }

    /// A vertical marker line at x, dashed, with a label.
    pub fn marker(&mut self, x: f64, label: &str) -> &mut Self {
        let (p, top, bottom) = (self.px(x), self.py(self.y.1), self.py(self.y.0));
        let _ = write!(
            self.body,
            r#"<path d="M{p:.1},{top:.1}V{bottom:.1}" stroke="{ACCENT}" stroke-dasharray="3 2"/><text x="{:.1}" y="{:.1}" fill="{ACCENT}">{}</text>"#,
            p + 3.0,
            top + 10.0,
            escape(label)
        );
        self
    }

    /// Raw SVG content in figure pixels.
    pub fn raw(&mut self, content: &str) -> &mut Self {
        self.body.push_str(content);
        self
    }

    /// The finished `<svg>` element, identified by `id` and described by `title`.
    pub fn finish(&self, id: &str, title: &str) -> String {
        svg_element(id, title, self.width, self.height, &self.body)
    }
}

/// An `<svg>` element with a title (read out by screen readers, shown on hover).
pub fn svg_element(id: &str, title: &str, width: f64, height: f64, body: &str) -> String {
    format!(
        r#"<svg xmlns="http://www.w3.org/2000/svg" id="{}" class="figure" viewBox="0 0 {width:.0} {height:.0}" width="{width:.0}" height="{height:.0}" font-size="10" font-family="sans-serif"><title>{}</title>{body}</svg>"#,
        escape(id),
        escape(title)
    )
}

/// A grey for `value` in [0, 1]: light (0) to dark (1).
pub fn grey(value: f64) -> String {
    let level = (235.0 - 200.0 * value.clamp(0.0, 1.0)).round() as u8;
    format!("#{level:02x}{level:02x}{level:02x}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_inside_the_range() {
        assert_eq!(ticks(0.0, 50.0, 5), vec![0.0, 10.0, 20.0, 30.0, 40.0, 50.0]);
        assert_eq!(ticks(-0.3, 0.9, 4), vec![0.0, 0.5]);
        assert_eq!(ticks(2.0, 2.0, 4), vec![2.0]);
    }

    #[test]
    fn labels_are_short_and_text_is_escaped() {
        assert_eq!(short(20.0), "20");
        assert_eq!(short(1.5), "1.5");
        assert_eq!(short(0.25), "0.25");
        assert_eq!(short(12000.0), "1.2e4");
        assert_eq!(escape("a<b & \"c\""), "a&lt;b &amp; &quot;c&quot;");
    }

    #[test]
    fn grey_runs_from_light_to_dark() {
        assert_eq!(grey(0.0), "#ebebeb");
        assert_eq!(grey(1.0), "#232323");
        assert_eq!(grey(7.0), "#232323");
    }
}
