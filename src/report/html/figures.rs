//! The HTML page's inline SVG figures: the audit's MSE bars split into bias^2 and variance,
//! and the sweep's three curves on a log axis with the MSE interval shaded as a band and the
//! one-standard-error region behind it. Drawn as plain SVG elements with classes, so the page's
//! stylesheet colours them in the light, dark and print schemes (report/svg.rs draws the
//! stand-alone `--plot` files with plotters, in fixed colours; its axis-range helpers are reused
//! here). No element refers to anything outside the page.

use super::esc;
use crate::report::groups::Group;
use crate::report::svg::{axis_unit, log_range};
use crate::report::table::num;
use crate::sweep::SweepReport;
use std::fmt::Write;

const W: f64 = 760.0;

/// "Nice" linear ticks from 0 to about `max` (steps of 1, 2 or 5 times a power of ten).
fn ticks(max: f64) -> Vec<f64> {
    if max <= 0.0 || !max.is_finite() {
        return vec![0.0, 1.0];
    }
    let raw = max / 5.0;
    let p = 10f64.powf(raw.log10().floor());
    let step = [1.0, 2.0, 5.0, 10.0]
        .into_iter()
        .map(|m| m * p)
        .find(|s| max / s <= 6.0)
        .unwrap_or(10.0 * p);
    (0..=((max / step).floor() as usize))
        .map(|i| i as f64 * step)
        .collect()
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

fn svg_open(id: &str, h: f64, title: &str) -> String {
    format!(
        "<svg class=\"plot\" id=\"{id}\" viewBox=\"0 0 {W} {h}\" role=\"img\" \
         aria-labelledby=\"{id}-title\"><title id=\"{id}-title\">{}</title>\n",
        esc(title)
    )
}

/// The audit's bars: one per table row (group), bias^2 then variance, the uncertain bias
/// hatched; the MSE written at the bar's end.
pub fn audit_bars(groups: &[Group], episodes: u64) -> String {
    let (left, right, top, row_h) = (190.0, 70.0, 12.0, 24.0);
    let n = groups.len();
    let h = top + row_h * n as f64 + 46.0;
    let fig = |x: Option<f64>| x.filter(|v| v.is_finite());
    let peak = groups
        .iter()
        .filter_map(|g| fig(g.first().mse))
        .fold(0.0, f64::max);
    let (unit, unit_text) = axis_unit(peak);
    let ts = ticks(peak / unit);
    let max = ts
        .last()
        .copied()
        .unwrap_or(1.0)
        .max(peak / unit * 1.02)
        .max(1e-300);
    let x = |v: f64| left + (W - left - right) * (v / unit / max).clamp(0.0, 1.0);
    let mut s = svg_open(
        "fig-bars",
        h,
        &format!("MSE of each estimator split into bias^2 and variance, {episodes} episodes"),
    );
    s.push_str(
        "<defs><pattern id=\"gradaudit-hatch\" width=\"6\" height=\"6\" \
         patternUnits=\"userSpaceOnUse\" patternTransform=\"rotate(45)\">\
         <line class=\"hatch\" x1=\"0\" y1=\"0\" x2=\"0\" y2=\"6\"/></pattern></defs>\n",
    );
    let base = top + row_h * n as f64;
    for t in &ts {
        let tx = x(t * unit);
        let _ = writeln!(
            s,
            "<line class=\"grid\" x1=\"{tx:.1}\" y1=\"{top}\" x2=\"{tx:.1}\" y2=\"{base}\"/>\
             <text x=\"{tx:.1}\" y=\"{:.1}\" text-anchor=\"middle\" class=\"dim\">{}</text>",
            base + 16.0,
            esc(&num(*t))
        );
    }
    for (i, g) in groups.iter().enumerate() {
        s.push_str(&bar(g, top + row_h * i as f64, row_h, left, &x));
    }
    let _ = writeln!(
        s,
        "<line class=\"axis\" x1=\"{left}\" y1=\"{top}\" x2=\"{left}\" y2=\"{base}\"/>\
         <text x=\"{:.1}\" y=\"{:.1}\" text-anchor=\"middle\">squared error of one update \
         (gradient units squared{})</text></svg>",
        left + (W - left - right) / 2.0,
        base + 38.0,
        esc(&unit_text)
    );
    s
}

/// One bar: the label, bias^2 (solid when detected, hatched when within noise), variance.
fn bar(g: &Group, y: f64, row_h: f64, left: f64, x: &dyn Fn(f64) -> f64) -> String {
    let e = g.first();
    let mid = y + row_h / 2.0 + 4.0;
    let label = if g.reference() {
        format!("{} (ref)", g.names())
    } else {
        g.names()
    };
    let mut s = format!(
        "<g class=\"bar\" data-names=\"{}\"><text x=\"{:.1}\" y=\"{mid:.1}\" \
         text-anchor=\"end\">{}</text>",
        esc(&g.names()),
        left - 8.0,
        esc(&label)
    );
    let parts = e
        .bias_sq
        .zip(e.mse)
        .filter(|(b, m)| b.is_finite() && m.is_finite());
    match parts {
        Some((b, m)) => {
            let (x0, xb, xm) = (x(0.0), x(b), x(m));
            // As the table's '?': a positive bias within resampling noise.
            let unsure = if b > 0.0 && !e.bias_detected {
                " unsure"
            } else {
                ""
            };
            let (by, bh) = (y + 4.0, row_h - 8.0);
            let _ = write!(
                s,
                "<rect class=\"bias{unsure}\" x=\"{x0:.1}\" y=\"{by:.1}\" width=\"{:.1}\" \
                 height=\"{bh:.1}\"/><rect class=\"var\" x=\"{xb:.1}\" y=\"{by:.1}\" \
                 width=\"{:.1}\" height=\"{bh:.1}\"/><text x=\"{:.1}\" y=\"{mid:.1}\" \
                 class=\"dim\">{}</text>",
                (xb - x0).max(0.0),
                (xm - xb).max(0.0),
                xm + 6.0,
                esc(&num(m))
            );
            if g.reference() {
                let _ = write!(
                    s,
                    "<line class=\"refline\" x1=\"{xm:.1}\" y1=\"{:.1}\" x2=\"{xm:.1}\" \
                     y2=\"{:.1}\"/>",
                    y + 1.0,
                    y + row_h - 1.0
                );
            }
        }
        None => {
            let _ = write!(
                s,
                "<text x=\"{:.1}\" y=\"{mid:.1}\" class=\"dim\">undefined (see the notes)</text>",
                left + 6.0
            );
        }
    }
    s.push_str("</g>\n");
    s
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

/// The sweep's curves: bias^2, variance and MSE against the grid, the MSE interval as a band,
/// the one-standard-error points shaded behind, the recommended point circled.
pub fn sweep_curves(r: &SweepReport) -> String {
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
    let mut s = svg_open(
        "fig-sweep",
        384.0,
        &format!(
            "bias^2, variance and MSE over {}, {} episodes",
            r.settings.over.key(),
            r.input.episodes
        ),
    );
    s.push_str(&y_axis(&f));
    s.push_str(&bands(r, &f));
    s.push_str(&curves(r, &f));
    s.push_str(&x_axis(r, &f));
    s.push_str("</svg>");
    s
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
    fn ticks_are_round_and_cover_the_range() {
        assert_eq!(ticks(4372.0), vec![0.0, 1000.0, 2000.0, 3000.0, 4000.0]);
        assert_eq!(ticks(9.0), vec![0.0, 2.0, 4.0, 6.0, 8.0]);
        assert_eq!(decade(2), "100");
        assert_eq!(decade(-1), "0.1");
        assert_eq!(decade(7), "1e7");
        assert_eq!(decade(4), "10000");
        assert_eq!(decade(-3), "0.001");
        assert_eq!(decade(0), "1");
    }
}
