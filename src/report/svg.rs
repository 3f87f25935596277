//! SVG plots drawn with plotters: the sweep's bias-variance curves and the audit's MSE split
//! into bias^2 and variance. Text is emitted as SVG text elements, so no font library is needed.

use super::AuditReport;
use crate::sweep::SweepReport;
use plotters::coord::CoordTranslate;
use plotters::coord::combinators::LogCoord;
use plotters::coord::ranged1d::{SegmentValue, SegmentedCoord};
use plotters::coord::types::{RangedCoordf64, RangedCoordusize};
use plotters::prelude::*;

const BIAS: RGBColor = RGBColor(200, 60, 40);
const VARIANCE: RGBColor = RGBColor(40, 90, 200);
const MSE: RGBColor = RGBColor(20, 20, 20);
const BAND: RGBColor = RGBColor(60, 170, 90);

fn failed<E: std::fmt::Debug>(e: E) -> String {
    format!("could not draw the plot: {e:?}")
}

/// Draws the series legend, framed, at `position`.
fn legend<'a, DB, CT>(
    chart: &mut ChartContext<'a, DB, CT>,
    position: SeriesLabelPosition,
) -> Result<(), String>
where
    DB: DrawingBackend + 'a,
    CT: CoordTranslate,
{
    chart
        .configure_series_labels()
        .position(position)
        .background_style(WHITE.mix(0.85))
        .border_style(BLACK)
        .draw()
        .map_err(failed)
}

/// A log axis's range around finite positive `values`: a third of a decade beyond them, at
/// most 1.6e308 and at most 300 decades wide (the smallest values go on the floor, as zeros
/// do). plotters' tick search counts the decades of hi / lo: an infinite ratio (an infinite end,
/// or more than 308 decades) made it loop for about 1e18 steps.
pub(crate) fn log_range(values: &[f64]) -> (f64, f64) {
    if values.is_empty() {
        return (1e-3, 1.0);
    }
    let lo = values.iter().copied().fold(f64::INFINITY, f64::min).log10() - 0.3;
    let hi = values
        .iter()
        .copied()
        .fold(f64::NEG_INFINITY, f64::max)
        .log10()
        + 0.3;
    // 10^308.2 is about 1.6e308, still finite; 10^-307 is still a normal number.
    let hi = hi.clamp(-306.4, 308.2);
    let lo = lo.max(hi - 300.0).max(-307.0).min(hi - 0.6);
    (10f64.powf(lo), 10f64.powf(hi))
}

/// A power of ten that brings `top` (finite, >= 0) into [1, 10), and its axis-title text, so a
/// linear axis never spans astronomically large or small numbers; 1 for tops in [1e-3, 1e5).
pub(crate) fn axis_unit(top: f64) -> (f64, String) {
    if top <= 0.0 || (1e-3..1e5).contains(&top) {
        return (1.0, String::new());
    }
    let e = top.log10().floor().clamp(-300.0, 308.0);
    (10f64.powf(e), format!(", in units of 1e{e}"))
}

/// The sweep's bias^2, variance and MSE against the swept parameter, log scale, with the
/// one-standard-error band shaded and the recommended point circled.
pub fn sweep_plot(r: &SweepReport) -> Result<String, String> {
    let p = r.points.len();
    let values: Vec<f64> = r
        .points
        .iter()
        .flat_map(|q| [q.bias_sq, q.variance, q.mse])
        .flatten()
        .filter(|x| x.is_finite() && *x > 0.0)
        .collect();
    let (lo, hi) = log_range(&values);
    // Zero values cannot sit on a log axis: they are drawn on its floor (said in the caption).
    // Undefined ones are left out of the curves.
    let y = |v: f64| v.clamp(lo, hi);
    let over = r.settings.over;
    let x_desc = match over {
        crate::sweep::Over::Lambda => "GAE lambda (dimensionless)",
        crate::sweep::Over::Nstep => "n-step window n (steps)",
        crate::sweep::Over::Gamma => "discount gamma (dimensionless)",
    };
    let labels: Vec<String> = r.points.iter().map(|q| q.label.clone()).collect();
    let mut svg = String::new();
    {
        let root = SVGBackend::with_string(&mut svg, (960, 560)).into_drawing_area();
        root.fill(&WHITE).map_err(failed)?;
        let title = format!(
            "gradaudit sweep over {} ({} episodes; zero values drawn on the floor)",
            over.key(),
            r.input.episodes
        );
        let mut chart = ChartBuilder::on(&root)
            .caption(title, ("sans-serif", 18))
            .margin(16)
            .x_label_area_size(50)
            .y_label_area_size(90)
            .build_cartesian_2d(
                (0..p.saturating_sub(1)).into_segmented(),
                (lo..hi).log_scale(),
            )
            .map_err(failed)?;
        chart
            .configure_mesh()
            .disable_x_mesh()
            .x_labels(p)
            .x_label_formatter(&|v| match v {
                SegmentValue::CenterOf(i) | SegmentValue::Exact(i) => {
                    labels.get(*i).cloned().unwrap_or_default()
                }
                SegmentValue::Last => String::new(),
            })
            .x_desc(x_desc)
            .y_desc("squared error of one update (gradient units squared)")
            .draw()
            .map_err(failed)?;
        draw_band(&mut chart, r, lo, hi)?;
        draw_curves(&mut chart, r, &y)?;
        // The lower left is where the curves rarely go: small errors at small parameters.
        legend(&mut chart, SeriesLabelPosition::LowerLeft)?;
        root.present().map_err(failed)?;
    }
    Ok(svg)
}

/// The sweep chart: grid points on x, squared error on a log y axis.
type SweepChart<'a, 'b> =
    ChartContext<'a, SVGBackend<'b>, Cartesian2d<SegmentedCoord<RangedCoordusize>, LogCoord<f64>>>;

/// Shades the one-standard-error band (none when the sweep made no choice).
fn draw_band(chart: &mut SweepChart, r: &SweepReport, lo: f64, hi: f64) -> Result<(), String> {
    let p = r.points.len();
    let band = &r.choice.band;
    let (Some(&a), Some(&last)) = (band.first(), band.last()) else {
        return Ok(());
    };
    let b = last + 1;
    let right = if b >= p {
        SegmentValue::Last
    } else {
        SegmentValue::Exact(b)
    };
    chart
        .draw_series(std::iter::once(Rectangle::new(
            [(SegmentValue::Exact(a), lo), (right, hi)],
            BAND.mix(0.15).filled(),
        )))
        .map_err(failed)?
        .label("within one standard error of the minimum")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], BAND.mix(0.3).filled()));
    Ok(())
}

/// The bias^2, variance and MSE curves (undefined points left out) and the recommended point
/// circled; `y` puts a value on the axis.
fn draw_curves(
    chart: &mut SweepChart,
    r: &SweepReport,
    y: &dyn Fn(f64) -> f64,
) -> Result<(), String> {
    type Figure = fn(&crate::sweep::SweepPoint) -> Option<f64>;
    let series: [(&str, RGBColor, u32, Figure); 3] = [
        ("bias^2", BIAS, 2, |q| q.bias_sq),
        ("variance", VARIANCE, 2, |q| q.variance),
        ("MSE", MSE, 3, |q| q.mse),
    ];
    for (name, color, width, f) in series {
        let pts: Vec<(SegmentValue<usize>, f64)> = r
            .points
            .iter()
            .enumerate()
            .filter_map(|(i, q)| Some((SegmentValue::CenterOf(i), y(f(q)?))))
            .collect();
        chart
            .draw_series(LineSeries::new(pts.clone(), color.stroke_width(width)))
            .map_err(failed)?
            .label(name)
            .legend(move |(x, y)| {
                PathElement::new(vec![(x, y), (x + 20, y)], color.stroke_width(width))
            });
        chart
            .draw_series(pts.into_iter().map(|pt| Circle::new(pt, 3, color.filled())))
            .map_err(failed)?;
    }
    let Some((rec, mse)) = r
        .choice
        .recommended
        .and_then(|i| Some((i, r.points[i].mse?)))
    else {
        return Ok(());
    };
    chart
        .draw_series(std::iter::once(Circle::new(
            (SegmentValue::CenterOf(rec), y(mse)),
            9,
            BAND.stroke_width(3),
        )))
        .map_err(failed)?
        .label(format!(
            "recommended: {} = {}",
            r.settings.over.key(),
            r.points[rec].label
        ))
        .legend(|(x, y)| Circle::new((x + 10, y), 6, BAND.stroke_width(3)));
    Ok(())
}

/// The audit's estimators as horizontal bars, MSE split into bias^2 and variance.
pub fn audit_bars(r: &AuditReport) -> Result<String, String> {
    let rows = &r.estimators;
    let n = rows.len();
    // Every drawn figure: the defined, finite ones (undefined rows get no bars).
    let fig = |x: Option<f64>| x.filter(|v| v.is_finite());
    let top = rows.iter().filter_map(|e| fig(e.mse)).fold(0.0, f64::max);
    let (unit, unit_text) = axis_unit(top);
    let max = if top > 0.0 { top / unit * 1.05 } else { 1.0 };
    let names: Vec<String> = rows
        .iter()
        .map(|e| {
            let name = if e.reference {
                format!("{} (ref)", e.name)
            } else {
                e.name.clone()
            };
            if fig(e.mse).is_none() {
                format!("{name} (undefined)")
            } else {
                name
            }
        })
        .collect();
    // (bias^2, mse) in axis units, for the rows whose figures are defined.
    let parts = |e: &super::EstimatorRow| -> Option<(f64, f64)> {
        Some((fig(e.bias_sq)? / unit, fig(e.mse)? / unit))
    };
    let mut svg = String::new();
    {
        let height = (60 + 28 * n).max(240) as u32;
        let root = SVGBackend::with_string(&mut svg, (900, height)).into_drawing_area();
        root.fill(&WHITE).map_err(failed)?;
        let mut chart = ChartBuilder::on(&root)
            .caption(
                format!(
                    "gradaudit audit: MSE = bias^2 + variance ({} episodes)",
                    r.input.episodes
                ),
                ("sans-serif", 18),
            )
            .margin(16)
            .x_label_area_size(45)
            .y_label_area_size(130)
            .build_cartesian_2d(0.0..max, (0..n.saturating_sub(1)).into_segmented())
            .map_err(failed)?;
        chart
            .configure_mesh()
            .disable_y_mesh()
            .y_labels(n)
            .y_label_formatter(&|v| match v {
                // Row 0 is drawn at the bottom; the lowest-MSE estimator goes on top.
                SegmentValue::CenterOf(i) | SegmentValue::Exact(i) => names
                    .get(n.wrapping_sub(1).wrapping_sub(*i))
                    .cloned()
                    .unwrap_or_default(),
                SegmentValue::Last => String::new(),
            })
            .x_desc(format!(
                "squared error of one update (gradient units squared{unit_text})"
            ))
            .draw()
            .map_err(failed)?;
        draw_bars(&mut chart, rows, &parts)?;
        // The lowest-MSE (shortest) bars are on top, so the upper right stays clear.
        legend(&mut chart, SeriesLabelPosition::UpperRight)?;
        root.present().map_err(failed)?;
    }
    Ok(svg)
}

/// The audit chart: squared error on x, one segment per estimator on y.
type BarChart<'a, 'b> =
    ChartContext<'a, SVGBackend<'b>, Cartesian2d<RangedCoordf64, SegmentedCoord<RangedCoordusize>>>;

/// One bar per estimator with defined figures, bias^2 then variance; `parts` gives (bias^2,
/// mse) in axis units, None where undefined.
fn draw_bars(
    chart: &mut BarChart,
    rows: &[super::EstimatorRow],
    parts: &dyn Fn(&super::EstimatorRow) -> Option<(f64, f64)>,
) -> Result<(), String> {
    let n = rows.len();
    let bar = |i: usize, from: f64, to: f64, color: RGBColor, opacity: f64| {
        let row = n - 1 - i;
        let top = if row + 1 >= n {
            SegmentValue::Last
        } else {
            SegmentValue::Exact(row + 1)
        };
        let mut r = Rectangle::new(
            [(from, SegmentValue::Exact(row)), (to, top)],
            color.mix(opacity).filled(),
        );
        r.set_margin(3, 3, 0, 0);
        r
    };
    // A bias that resampling noise could explain is drawn pale (the table's '?').
    chart
        .draw_series(
            rows.iter()
                .enumerate()
                .filter(|(_, e)| e.bias_detected)
                .filter_map(|(i, e)| parts(e).map(|(b, _)| bar(i, 0.0, b, BIAS, 0.85))),
        )
        .map_err(failed)?
        .label("bias^2")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], BIAS.filled()));
    chart
        .draw_series(
            rows.iter()
                .enumerate()
                .filter(|(_, e)| !e.bias_detected)
                .filter_map(|(i, e)| parts(e).map(|(b, _)| bar(i, 0.0, b, BIAS, 0.3))),
        )
        .map_err(failed)?
        .label("bias^2 within resampling noise (may be 0)")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], BIAS.mix(0.3).filled()));
    chart
        .draw_series(
            rows.iter()
                .enumerate()
                .filter_map(|(i, e)| parts(e).map(|(b, m)| bar(i, b, m, VARIANCE, 0.85))),
        )
        .map_err(failed)?
        .label("variance")
        .legend(|(x, y)| Rectangle::new([(x, y - 5), (x + 20, y + 5)], VARIANCE.filled()));
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn plot_axes_of_astronomical_figures_stay_normal() {
        // Figures up to f64::MAX and down to the smallest subnormal: the log axis's ends are
        // normal numbers at most 1.6e308, 0.6 to 300 decades apart.
        for values in [
            vec![1e304, 0.1],
            vec![f64::MAX],
            vec![5e-324],
            vec![5e-324, f64::MAX],
            vec![1.0, 1.0],
        ] {
            let (lo, hi) = log_range(&values);
            assert!(lo.is_normal() && hi.is_normal() && lo > 0.0, "{values:?}");
            assert!(hi / lo >= 10f64.powf(0.59), "{values:?}: {lo} {hi}");
            assert!(
                hi <= 1.6e308 && (hi / lo).log10() <= 300.0 + 1e-9,
                "{values:?}"
            );
            // The largest value lies on the axis unless beyond 1.5e308: 1e304 is not pushed
            // to an edge.
            let top = values.iter().copied().fold(0.0, f64::max);
            if (1e-300..=1.5e308).contains(&top) {
                assert!(lo <= top && top <= hi, "{top} in {lo}..{hi}");
            }
        }
        // A linear axis's top is brought into [1, 10) units of a power of ten.
        let (unit, text) = axis_unit(7.5e304);
        assert_eq!((unit, text.as_str()), (1e304, ", in units of 1e304"));
        let (unit, _) = axis_unit(f64::MAX);
        assert!(unit.is_finite() && (1.0..10.0).contains(&(f64::MAX / unit)));
        assert_eq!(axis_unit(12.0).0, 1.0);
    }

    fn point(i: usize, mse: Option<f64>) -> crate::sweep::SweepPoint {
        crate::sweep::SweepPoint {
            label: i.to_string(),
            value: Some(i as f64),
            estimator: format!("nstep:{i}"),
            gamma: 0.99,
            bias_sq: mse.map(|m| m / 4.0),
            bias_detected: true,
            variance: mse.map(|m| m * 0.75),
            mse,
            mse_se: None,
            mse_interval: None,
            snr: None,
            ess: None,
            episodes_for_snr: None,
            bias_limited: false,
            notes: vec![],
        }
    }

    #[test]
    fn plot_of_astronomical_figures_finishes() {
        // MSEs from 1e-310 (subnormal) to f64::MAX, and an undefined point: the plot is drawn
        // (it never finished when an axis end was infinite) and holds no NaN or inf.
        let points = vec![
            point(1, Some(f64::MAX)),
            point(2, None),
            point(3, Some(1e-310)),
            point(4, Some(1e300)),
        ];
        let choice = crate::sweep::choose(&points, crate::sweep::Over::Nstep);
        let report = SweepReport {
            tool: crate::report::Tool::current(),
            input: Default::default(),
            settings: crate::sweep::SweepSettings {
                over: crate::sweep::Over::Nstep,
                family: "nstep".into(),
                gamma: 0.99,
                reference: "rtg".into(),
                resamples: 2,
                seed: 1,
                confidence: 0.95,
                target_snr: 1.0,
            },
            signal: None,
            points,
            choice,
            warnings: Default::default(),
        };
        let svg = sweep_plot(&report).unwrap();
        roxmltree::Document::parse(&svg).expect("well-formed SVG");
        assert!(!svg.contains("NaN") && !svg.contains("inf"), "{svg}");
    }
}
