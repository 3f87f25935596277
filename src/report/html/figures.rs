//! The HTML page's inline SVG figures: the audit's MSE bars split into bias^2 and variance
//! (here), and the sweep's curves (report/curves.rs, the one drawing that the stand-alone
//! `--plot` file uses too). Drawn as plain SVG elements with classes, so the page's stylesheet
//! colours them in the light, dark and print schemes (report/svg.rs draws the audit's
//! stand-alone `--plot` bars with plotters, in fixed colours; its axis-range helpers are reused
//! here). No element refers to anything outside the page.

use super::esc;
use crate::report::groups::Group;
use crate::report::svg::axis_unit;
use crate::report::table::num;
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ticks_are_round_and_cover_the_range() {
        assert_eq!(ticks(4372.0), vec![0.0, 1000.0, 2000.0, 3000.0, 4000.0]);
        assert_eq!(ticks(9.0), vec![0.0, 2.0, 4.0, 6.0, 8.0]);
    }
}
