//! The sweep's curves as plain SVG, drawn once for both places they appear: inline in the HTML
//! page (report/html.rs; coloured by the page's stylesheet, light, dark or print, and keyed by
//! the page's own legend) and as the stand-alone `sweep --plot FILE.svg` (with a stylesheet of
//! fixed light colours, a white background, a title and a key of its own). Both show bias^2,
//! variance and MSE against the grid on a log axis, the MSE's bootstrap interval shaded as a
//! band (a polygon through each point's interval ends, over runs of points where it is
//! defined), the points within one standard error of the lowest MSE shaded behind with a strip
//! on the floor, and the recommended point circled. Zero values sit on the axis floor;
//! undefined ones break their curve. No element refers to anything outside the file.

use super::html::esc;
use super::svg::log_range;
use crate::sweep::SweepReport;
use std::fmt::Write;

const W: f64 = 760.0;
/// Height of the plot itself (axes and their labels).
const PLOT_H: f64 = 384.0;

/// Where the drawing goes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Target {
    /// Inline in the HTML page: its stylesheet colours the classes, its legend keys them.
    Page,
    /// A stand-alone SVG file: its own colours, background, title and key.
    File,
}

/// The fixed colours of the stand-alone file: the page's light scheme (html/style.css). No `<`
/// or `&`, so the file stays well-formed XML.
const FILE_STYLE: &str = "text { fill: #1d1f23; font: 12px sans-serif; } \
    text.dim { fill: #5b616b; } text.title { font-size: 15px; font-weight: bold; } \
    .grid { stroke: #d8d4ca; stroke-width: 1; } .axis { stroke: #5b616b; stroke-width: 1; fill: none; } \
    .se { fill: #2e965a; fill-opacity: 0.09; } .se-strip { fill: #1f7a4d; } \
    .band { fill: #2b5ea8; fill-opacity: 0.16; } .line { fill: none; stroke-width: 2; } \
    .line.bias { stroke: #b8432f; } .line.var { stroke: #2b5ea8; } \
    .line.mse { stroke: #1d1f23; stroke-width: 3; } .dot.bias { fill: #b8432f; } \
    .dot.var { fill: #2b5ea8; } .dot.mse { fill: #1d1f23; } \
    .rec { fill: none; stroke: #1f7a4d; stroke-width: 3; } \
    .keybox { stroke: #1f7a4d; stroke-width: 1; stroke-dasharray: 3 2; }";

/// The sweep's figure for `target`: the same elements in both, wrapped for the page or as a
/// stand-alone document.
pub fn sweep_svg(r: &SweepReport, target: Target) -> String {
    let title = format!(
        "bias^2, variance and MSE over {}, {} episodes",
        r.settings.over.key(),
        r.input.episodes
    );
    let body = plot(r);
    match target {
        Target::Page => format!(
            "<svg class=\"plot\" id=\"fig-sweep\" viewBox=\"0 0 {W} {PLOT_H}\" role=\"img\" \
             aria-labelledby=\"fig-sweep-title\"><title id=\"fig-sweep-title\">{}</title>\n\
             {body}</svg>",
            esc(&title)
        ),
        Target::File => {
            let (top, key_h) = (34.0, 52.0);
            let h = top + PLOT_H + key_h;
            format!(
                "<svg xmlns=\"http://www.w3.org/2000/svg\" class=\"plot\" width=\"960\" \
                 height=\"{:.0}\" viewBox=\"0 0 {W} {h}\" role=\"img\"><title>gradaudit sweep: \
                 {}</title>\n<style>{FILE_STYLE}</style>\n<rect width=\"{W}\" height=\"{h}\" \
                 fill=\"#ffffff\"/>\n<text class=\"title\" x=\"{:.1}\" y=\"22\" \
                 text-anchor=\"middle\">gradaudit sweep over {} ({} episodes; zero values on the \
                 floor)</text>\n<g transform=\"translate(0 {top})\">\n{body}</g>\n{}</svg>\n",
                h * 960.0 / W,
                esc(&title),
                W / 2.0,
                r.settings.over.key(),
                r.input.episodes,
                key(r, top + PLOT_H + 6.0)
            )
        }
    }
}

/// The plot's elements: axes, the shaded regions, the curves.
fn plot(r: &SweepReport) -> String {
    let n = r.points.len().max(1);
    let values: Vec<f64> = r
        .points
        .iter()
        .flat_map(|p| {
            let iv = p.mse_interval.map(|i| [i.low, i.high]).unwrap_or([0.0; 2]);
            [p.bias_sq, p.variance, p.mse, Some(iv[0]), Some(iv[1])]
        })
        .flatten()
        .filter(|v| v.is_finite() && *v > 0.0)
        .collect();
    let (lo, hi) = log_range(&values);
    let f = Frame {
        left: 70.0,
        right: W - 16.0,
        top: 14.0,
        bottom: 330.0,
        n,
        lo,
        hi,
    };
    let mut s = y_axis(&f);
    s.push_str(&bands(r, &f));
    s.push_str(&curves(r, &f));
    s.push_str(&x_axis(r, &f));
    s
}

/// The stand-alone file's key, in two rows from `y` down (the page has its own in HTML).
fn key(r: &SweepReport, y: f64) -> String {
    let rec = r.choice.recommended.map(|i| {
        format!(
            "recommended: {} = {}",
            r.settings.over.key(),
            r.points[i].label
        )
    });
    let interval = format!("MSE {}% interval", r.settings.confidence * 100.0);
    let rows: [Vec<(&str, String)>; 2] = [
        vec![
            ("mse", "MSE".into()),
            ("band", interval),
            ("bias", "bias^2".into()),
            ("var", "variance".into()),
        ],
        std::iter::once((
            "se",
            "within one standard error of the lowest MSE".to_string(),
        ))
        .chain(rec.map(|t| ("rec", t)))
        .collect(),
    ];
    let mut s = String::new();
    for (k, row) in rows.iter().enumerate() {
        let cy = y + 12.0 + 20.0 * k as f64;
        let mut x = 70.0;
        for (class, label) in row {
            let swatch = match *class {
                "band" => format!(
                    "<rect class=\"band\" x=\"{x:.1}\" y=\"{:.1}\" width=\"22\" height=\"10\"/>",
                    cy - 5.0
                ),
                // The region is pale: outlined in the key, as the page's key does.
                "se" => format!(
                    "<rect class=\"se keybox\" x=\"{x:.1}\" y=\"{:.1}\" width=\"22\" \
                     height=\"10\"/>",
                    cy - 5.0
                ),
                "rec" => format!(
                    "<circle class=\"rec\" cx=\"{:.1}\" cy=\"{cy:.1}\" r=\"6\"/>",
                    x + 11.0
                ),
                _ => format!(
                    "<path class=\"line {class}\" d=\"M{x:.1},{cy:.1} L{:.1},{cy:.1}\"/>",
                    x + 22.0
                ),
            };
            let _ = write!(
                s,
                "{swatch}<text x=\"{:.1}\" y=\"{:.1}\">{}</text>",
                x + 28.0,
                cy + 4.0,
                esc(label)
            );
            // About 6.5 units a character at 12px.
            x += 28.0 + 6.5 * label.len() as f64 + 22.0;
        }
        s.push('\n');
    }
    s
}

/// A decade's label: plain for 1e-3 to 1e4, else 1eK.
fn decade(k: i32) -> String {
    if (0..=4).contains(&k) {
        format!("1{}", "0".repeat(k as usize))
    } else if (-3..0).contains(&k) {
        format!("0.{}1", "0".repeat((-k - 1) as usize))
    } else {
        format!("1e{k}")
    }
}

/// The sweep's plot area and its log y axis.
struct Frame {
    left: f64,
    right: f64,
    top: f64,
    bottom: f64,
    n: usize,
    lo: f64,
    hi: f64,
}

impl Frame {
    fn x(&self, i: usize) -> f64 {
        self.left + (self.right - self.left) * (i as f64 + 0.5) / self.n as f64
    }

    /// A value's height; zero and values below the axis sit on its floor.
    fn y(&self, v: f64) -> f64 {
        let v = v.clamp(self.lo, self.hi);
        let f = (v.log10() - self.lo.log10()) / (self.hi.log10() - self.lo.log10());
        self.bottom - (self.bottom - self.top) * f
    }
}

fn y_axis(f: &Frame) -> String {
    let mut s = String::new();
    let (a, b) = (f.lo.log10().ceil() as i32, f.hi.log10().floor() as i32);
    // Every decade, thinned to at most 8 labels.
    let every = (((b - a + 1) as f64 / 8.0).ceil() as i32).max(1);
    for k in (a..=b).filter(|k| (k - a) % every == 0) {
        let y = f.y(10f64.powi(k));
        let _ = writeln!(
            s,
            "<line class=\"grid\" x1=\"{}\" y1=\"{y:.1}\" x2=\"{}\" y2=\"{y:.1}\"/>\
             <text x=\"{}\" y=\"{:.1}\" text-anchor=\"end\" class=\"dim\">{}</text>",
            f.left,
            f.right,
            f.left - 6.0,
            y + 4.0,
            decade(k)
        );
    }
    let _ = writeln!(
        s,
        "<line class=\"axis\" x1=\"{l}\" y1=\"{t}\" x2=\"{l}\" y2=\"{b}\"/>\
         <line class=\"axis\" x1=\"{l}\" y1=\"{b}\" x2=\"{r}\" y2=\"{b}\"/>\
         <text transform=\"translate(16 {:.1}) rotate(-90)\" text-anchor=\"middle\">squared \
         error (log scale)</text>",
        (f.top + f.bottom) / 2.0,
        l = f.left,
        t = f.top,
        b = f.bottom,
        r = f.right
    );
    s
}

fn x_axis(r: &SweepReport, f: &Frame) -> String {
    let mut s = String::new();
    let every = r.points.len().div_ceil(21).max(1);
    for (i, p) in r.points.iter().enumerate().filter(|(i, _)| i % every == 0) {
        let _ = writeln!(
            s,
            "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\" class=\"dim\">{}</text>",
            f.x(i),
            f.bottom + 16.0,
            esc(&p.label)
        );
    }
    let what = match r.settings.over {
        crate::sweep::Over::Lambda => "GAE lambda",
        crate::sweep::Over::Nstep => "n-step window n (steps)",
        crate::sweep::Over::Gamma => "discount gamma",
    };
    let _ = writeln!(
        s,
        "<text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">{what}</text>",
        (f.left + f.right) / 2.0,
        f.bottom + 40.0
    );
    s
}

/// The one-standard-error region (a column per point in it) and the MSE interval band
/// (polygons over runs of points whose interval is defined).
fn bands(r: &SweepReport, f: &Frame) -> String {
    let mut s = String::new();
    let step = (f.right - f.left) / f.n as f64;
    // Pale columns over the plot and a solid strip on the floor, which stays readable
    // where the columns cover the whole plot.
    for &i in &r.choice.band {
        let _ = writeln!(
            s,
            "<rect class=\"se\" x=\"{x:.1}\" y=\"{}\" width=\"{step:.1}\" height=\"{}\"/>\
             <rect class=\"se-strip\" x=\"{x:.1}\" y=\"{:.1}\" width=\"{step:.1}\" \
             height=\"5\"/>",
            f.top,
            f.bottom - f.top,
            f.bottom - 5.0,
            x = f.x(i) - step / 2.0,
        );
    }
    let mut run: Vec<(usize, f64, f64)> = Vec::new();
    let flush = |run: &mut Vec<(usize, f64, f64)>, s: &mut String| {
        if run.len() >= 2 {
            let upper = run
                .iter()
                .map(|(i, _, h)| format!("{:.1},{:.1}", f.x(*i), f.y(*h)));
            let lower = run
                .iter()
                .rev()
                .map(|(i, l, _)| format!("{:.1},{:.1}", f.x(*i), f.y(*l)));
            let pts: Vec<String> = upper.chain(lower).collect();
            let _ = writeln!(s, "<polygon class=\"band\" points=\"{}\"/>", pts.join(" "));
        }
        run.clear();
    };
    for (i, p) in r.points.iter().enumerate() {
        match p
            .mse_interval
            .filter(|iv| iv.low.is_finite() && iv.high.is_finite())
        {
            Some(iv) => run.push((i, iv.low, iv.high)),
            None => flush(&mut run, &mut s),
        }
    }
    flush(&mut run, &mut s);
    s
}

/// The three curves (broken where a figure is undefined) with a dot per point, and the
/// recommended point circled.
fn curves(r: &SweepReport, f: &Frame) -> String {
    type Figure = fn(&crate::sweep::SweepPoint) -> Option<f64>;
    let series: [(&str, Figure); 3] = [
        ("bias", |p| p.bias_sq),
        ("var", |p| p.variance),
        ("mse", |p| p.mse),
    ];
    let mut s = String::new();
    for (class, fig) in series {
        let pts: Vec<(usize, f64)> = r
            .points
            .iter()
            .enumerate()
            .filter_map(|(i, p)| Some((i, fig(p).filter(|v| v.is_finite())?)))
            .collect();
        let mut path = String::new();
        for (k, (i, v)) in pts.iter().enumerate() {
            let joined = k > 0 && pts[k - 1].0 + 1 == *i;
            let cmd = if joined { 'L' } else { 'M' };
            let _ = write!(path, "{cmd}{:.1},{:.1} ", f.x(*i), f.y(*v));
        }
        let _ = writeln!(
            s,
            "<path class=\"line {class}\" d=\"{}\"/>",
            path.trim_end()
        );
        for (i, v) in &pts {
            let _ = write!(
                s,
                "<circle class=\"dot {class}\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"3\"/>",
                f.x(*i),
                f.y(*v)
            );
        }
        s.push('\n');
    }
    if let Some((i, m)) = r
        .choice
        .recommended
        .and_then(|i| Some((i, r.points[i].mse?)))
    {
        let _ = writeln!(
            s,
            "<circle class=\"rec\" cx=\"{:.1}\" cy=\"{:.1}\" r=\"9\"/>",
            f.x(i),
            f.y(m)
        );
    }
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn decades_read_plainly_near_one() {
        assert_eq!(decade(2), "100");
        assert_eq!(decade(-1), "0.1");
        assert_eq!(decade(7), "1e7");
        assert_eq!(decade(4), "10000");
        assert_eq!(decade(-3), "0.001");
        assert_eq!(decade(0), "1");
    }

    #[test]
    fn file_style_stays_xml_text() {
        assert!(!FILE_STYLE.contains('<') && !FILE_STYLE.contains('&'));
    }
}
