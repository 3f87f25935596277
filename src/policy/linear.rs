//! The linear families' description fields (`gaussian_linear`, `softmax_linear`,
//! `bernoulli_logistic`) and their validation; the math is in family.rs.

use super::description::Ctx;
use super::family::Family;
use super::{Built, Model};
use crate::error::Result;
use serde::Deserialize;

#[derive(Debug, Clone, Deserialize)]
#[serde(deny_unknown_fields)]
struct Wire {
    #[allow(dead_code)]
    schema: String,
    family: String,
    features: Vec<String>,
    #[serde(default)]
    constant_feature: bool,
    #[serde(default)]
    actions: Option<Vec<String>>,
    #[serde(default)]
    action: Option<String>,
    #[serde(rename = "W", default)]
    w_matrix: Option<Vec<Vec<f64>>>,
    #[serde(default)]
    c: Option<serde_json::Value>,
    #[serde(default)]
    log_sigma: Option<Vec<f64>>,
    #[serde(default)]
    sigma: Option<Vec<f64>>,
    #[serde(default)]
    learn_log_sigma: Option<bool>,
    #[serde(default)]
    theta: Option<Vec<Vec<f64>>>,
    #[serde(default)]
    w: Option<Vec<f64>>,
    /// Free text (where the file came from); ignored.
    #[serde(default)]
    #[allow(dead_code)]
    note: Option<String>,
}

/// Parses a linear family's description.
pub fn build(ctx: Ctx, text: &str) -> Result<Built> {
    let w: Wire = ctx.parse(text)?;
    if w.features.is_empty() && !w.constant_feature {
        return Err(
            ctx.bad("the policy has no features (list obs columns, or set constant_feature)")
        );
    }
    let features = ctx.obs(&w.features)?;
    let p = features.len() + usize::from(w.constant_feature);
    let (family, actions, parameters) = match w.family.as_str() {
        "gaussian_linear" => gaussian(ctx, &w, p)?,
        "softmax_linear" => softmax(ctx, &w, p)?,
        "bernoulli_logistic" => bernoulli(ctx, &w, p)?,
        other => unreachable!("family {other} is dispatched elsewhere"),
    };
    Ok(Built {
        model: Model::Linear(family),
        features,
        constant_feature: w.constant_feature,
        actions,
        parameters,
    })
}

/// A matrix field with `p` columns (and `rows` rows when given).
fn matrix(
    ctx: Ctx,
    w: &Wire,
    m: &Option<Vec<Vec<f64>>>,
    what: &str,
    rows: Option<usize>,
    p: usize,
) -> Result<Vec<Vec<f64>>> {
    let m = m
        .clone()
        .ok_or_else(|| ctx.bad(format!("the policy needs \"{what}\"")))?;
    if let Some(r) = rows
        && m.len() != r
    {
        return Err(ctx.bad(format!("\"{what}\" has {} rows, expected {r}", m.len())));
    }
    if m.is_empty() {
        return Err(ctx.bad(format!("\"{what}\" is empty")));
    }
    for (i, row) in m.iter().enumerate() {
        if row.len() != p {
            let constant = if w.constant_feature {
                ", constant last"
            } else {
                ""
            };
            return Err(ctx.bad(format!(
                "\"{what}\" row {i} has {} entries, expected {p} (one per feature{constant})",
                row.len()
            )));
        }
        ctx.finite(row, what)?;
    }
    Ok(m)
}

/// Names "{base}[i,j]" of an r x p matrix, row-major.
fn matrix_names(base: &str, r: usize, p: usize) -> Vec<String> {
    (0..r)
        .flat_map(|i| (0..p).map(move |j| format!("{base}[{i},{j}]")))
        .collect()
}

type Parts = (Family, Vec<usize>, Vec<String>);

fn gaussian(ctx: Ctx, w: &Wire, p: usize) -> Result<Parts> {
    let acts = w
        .actions
        .clone()
        .ok_or_else(|| ctx.bad("gaussian_linear needs \"actions\""))?;
    let actions = ctx.act(&acts)?;
    let m = actions.len();
    let wm = matrix(ctx, w, &w.w_matrix, "W", Some(m), p)?;
    let c: Vec<f64> = match &w.c {
        Some(v) => serde_json::from_value(v.clone())
            .map_err(|_| ctx.bad("\"c\" must be a list of numbers, one per action"))?,
        None => vec![0.0; m],
    };
    if c.len() != m {
        return Err(ctx.bad(format!("\"c\" has {} entries, expected {m}", c.len())));
    }
    ctx.finite(&c, "c")?;
    let log_sigma = log_sigma(ctx, w, m)?;
    let learn = w.learn_log_sigma.unwrap_or(true);
    let mut params = matrix_names("W", m, p);
    params.extend((0..m).map(|i| format!("c[{i}]")));
    if learn {
        params.extend((0..m).map(|i| format!("log_sigma[{i}]")));
    }
    let family = Family::Gaussian {
        w: wm,
        c,
        log_sigma,
        learn_log_sigma: learn,
    };
    Ok((family, actions, params))
}

/// The standard deviations, from exactly one of "log_sigma" and "sigma".
fn log_sigma(ctx: Ctx, w: &Wire, m: usize) -> Result<Vec<f64>> {
    let ls: Vec<f64> = match (&w.log_sigma, &w.sigma) {
        (Some(l), None) => {
            ctx.finite(l, "log_sigma")?;
            l.clone()
        }
        (None, Some(s)) => {
            if let Some(x) = s.iter().find(|x| !(**x > 0.0 && x.is_finite())) {
                return Err(ctx.bad(format!(
                    "standard deviation {x} in \"sigma\" must be positive and finite"
                )));
            }
            s.iter().map(|x| x.ln()).collect()
        }
        _ => return Err(ctx.bad("give exactly one of \"log_sigma\" and \"sigma\"")),
    };
    if ls.len() != m {
        return Err(ctx.bad(format!(
            "the standard deviations have {} entries, expected {m}",
            ls.len()
        )));
    }
    Ok(ls)
}

fn softmax(ctx: Ctx, w: &Wire, p: usize) -> Result<Parts> {
    let a = w.action.clone().ok_or_else(|| {
        ctx.bad("softmax_linear needs \"action\" (one column of action indices 0..K-1)")
    })?;
    let actions = ctx.act(&[a])?;
    let theta = matrix(ctx, w, &w.theta, "theta", None, p)?;
    if theta.len() < 2 {
        return Err(ctx.bad("softmax_linear needs at least 2 actions (rows of \"theta\")"));
    }
    let params = matrix_names("theta", theta.len(), p);
    Ok((Family::Softmax { theta }, actions, params))
}

fn bernoulli(ctx: Ctx, w: &Wire, p: usize) -> Result<Parts> {
    let a = w
        .action
        .clone()
        .ok_or_else(|| ctx.bad("bernoulli_logistic needs \"action\" (one 0/1 column)"))?;
    let actions = ctx.act(&[a])?;
    let wv =
        w.w.clone()
            .ok_or_else(|| ctx.bad("bernoulli_logistic needs \"w\""))?;
    if wv.len() != p {
        return Err(ctx.bad(format!("\"w\" has {} entries, expected {p}", wv.len())));
    }
    ctx.finite(&wv, "w")?;
    let c: f64 = match &w.c {
        Some(v) => {
            serde_json::from_value(v.clone()).map_err(|_| ctx.bad("\"c\" must be a number"))?
        }
        None => 0.0,
    };
    if !c.is_finite() {
        return Err(ctx.bad("\"c\" must be finite"));
    }
    let mut params: Vec<String> = (0..p).map(|j| format!("w[{j}]")).collect();
    params.push("c".into());
    Ok((Family::Bernoulli { w: wv, c }, actions, params))
}
