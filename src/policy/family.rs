//! The policy families' log-densities and score vectors in closed form.
//!
//! Gaussian (Sutton and Barto 2018, section 13.7, with a linear mean and per-action log sigma):
//!   d/dW_ij log pi = (a_i - mu_i) / sigma_i^2 phi_j,  d/dc_i = (a_i - mu_i) / sigma_i^2,
//!   d/dlog sigma_i = (a_i - mu_i)^2 / sigma_i^2 - 1.
//! Softmax with linear preferences (Sutton and Barto 2018, eq. 13.9, features x(s, b) =
//! phi(s) in block b): d/dtheta_bj log pi(a) = (1[b = a] - pi(b)) phi_j.
//! Bernoulli logistic: d/dw_j log pi(a) = (a - p) phi_j, d/dc = a - p, p = sigmoid(w.phi + c).

use std::f64::consts::PI;

#[derive(Debug, Clone, PartialEq)]
pub enum Family {
    Gaussian {
        /// m x p
        w: Vec<Vec<f64>>,
        c: Vec<f64>,
        log_sigma: Vec<f64>,
        learn_log_sigma: bool,
    },
    Softmax {
        /// K x p
        theta: Vec<Vec<f64>>,
    },
    Bernoulli {
        w: Vec<f64>,
        c: f64,
    },
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// The discrete action index in `a`, if it is a whole number in 0..k.
fn index(a: f64, k: usize) -> Result<usize, String> {
    if a.fract() == 0.0 && a >= 0.0 && (a as usize) < k {
        Ok(a as usize)
    } else {
        Err(format!(
            "action {a} is outside the discrete range 0..{}",
            k - 1
        ))
    }
}

/// Softmax probabilities of preferences `h`, shifted by the maximum for stability.
fn softmax(h: &[f64]) -> Vec<f64> {
    let m = h.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let e: Vec<f64> = h.iter().map(|x| (x - m).exp()).collect();
    let z: f64 = e.iter().sum();
    e.into_iter().map(|x| x / z).collect()
}

fn sigmoid(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

impl Family {
    /// log pi(a | s) for features `phi` and action components `a`.
    pub fn log_density(&self, phi: &[f64], a: &[f64]) -> Result<f64, String> {
        match self {
            Family::Gaussian {
                w, c, log_sigma, ..
            } => Ok((0..w.len())
                .map(|i| {
                    let z = (a[i] - dot(&w[i], phi) - c[i]) / log_sigma[i].exp();
                    -0.5 * z * z - log_sigma[i] - 0.5 * (2.0 * PI).ln()
                })
                .sum()),
            Family::Softmax { theta } => {
                let k = index(a[0], theta.len())?;
                let h: Vec<f64> = theta.iter().map(|t| dot(t, phi)).collect();
                let m = h.iter().copied().fold(f64::NEG_INFINITY, f64::max);
                let lse = m + h.iter().map(|x| (x - m).exp()).sum::<f64>().ln();
                Ok(h[k] - lse)
            }
            Family::Bernoulli { w, c } => {
                let a = index(a[0], 2)?;
                let x = dot(w, phi) + c;
                // log sigmoid(x) = -log(1 + e^-x), computed without overflow for either sign.
                let log_sig = |x: f64| {
                    if x >= 0.0 {
                        -(-x).exp().ln_1p()
                    } else {
                        x - x.exp().ln_1p()
                    }
                };
                Ok(if a == 1 { log_sig(x) } else { log_sig(-x) })
            }
        }
    }

    /// The score vector grad_theta log pi(a | s), in the documented parameter order.
    pub fn score(&self, phi: &[f64], a: &[f64], out: &mut [f64]) -> Result<(), String> {
        let p = phi.len();
        match self {
            Family::Gaussian {
                w,
                c,
                log_sigma,
                learn_log_sigma,
            } => {
                let m = w.len();
                for i in 0..m {
                    let var = (2.0 * log_sigma[i]).exp();
                    let r = a[i] - dot(&w[i], phi) - c[i];
                    for j in 0..p {
                        out[i * p + j] = r / var * phi[j];
                    }
                    out[m * p + i] = r / var;
                    if *learn_log_sigma {
                        out[m * p + m + i] = r * r / var - 1.0;
                    }
                }
            }
            Family::Softmax { theta } => {
                let k = index(a[0], theta.len())?;
                let h: Vec<f64> = theta.iter().map(|t| dot(t, phi)).collect();
                let pi = softmax(&h);
                for (b, pb) in pi.iter().enumerate() {
                    let ind = if b == k { 1.0 } else { 0.0 };
                    for j in 0..p {
                        out[b * p + j] = (ind - pb) * phi[j];
                    }
                }
            }
            Family::Bernoulli { w, c } => {
                let a = index(a[0], 2)? as f64;
                let g = a - sigmoid(dot(w, phi) + c);
                for j in 0..p {
                    out[j] = g * phi[j];
                }
                out[p] = g;
            }
        }
        // A score beyond f64 (a sigma near 0, huge weights) would leave every figure undefined.
        if out.iter().any(|x| !x.is_finite()) {
            return Err(
                "the policy's score is not a finite number: its parameters overflow f64 \
                        here (a sigma near 0 or huge weights); check the policy file"
                    .into(),
            );
        }
        Ok(())
    }

    /// The parameters as one flat vector (the score's order), and the inverse.
    pub fn flatten(&self) -> Vec<f64> {
        match self {
            Family::Gaussian {
                w,
                c,
                log_sigma,
                learn_log_sigma,
            } => {
                let mut v: Vec<f64> = w.iter().flatten().copied().collect();
                v.extend(c);
                if *learn_log_sigma {
                    v.extend(log_sigma);
                }
                v
            }
            Family::Softmax { theta } => theta.iter().flatten().copied().collect(),
            Family::Bernoulli { w, c } => w.iter().copied().chain([*c]).collect(),
        }
    }

    pub fn with_flat(&self, v: &[f64]) -> Family {
        match self {
            Family::Gaussian {
                w,
                log_sigma,
                learn_log_sigma,
                ..
            } => {
                let (m, p) = (w.len(), w[0].len());
                Family::Gaussian {
                    w: (0..m).map(|i| v[i * p..(i + 1) * p].to_vec()).collect(),
                    c: v[m * p..m * p + m].to_vec(),
                    log_sigma: if *learn_log_sigma {
                        v[m * p + m..].to_vec()
                    } else {
                        log_sigma.clone()
                    },
                    learn_log_sigma: *learn_log_sigma,
                }
            }
            Family::Softmax { theta } => {
                let p = theta[0].len();
                Family::Softmax {
                    theta: (0..theta.len())
                        .map(|b| v[b * p..(b + 1) * p].to_vec())
                        .collect(),
                }
            }
            Family::Bernoulli { w, .. } => Family::Bernoulli {
                w: v[..w.len()].to_vec(),
                c: v[w.len()],
            },
        }
    }
}
