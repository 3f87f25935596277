//! Policy scores against finite differences of their own log-densities, against the closed
//! forms of Sutton and Barto (2018), worked by hand, and the file's validation errors.

use super::*;
use crate::log::ColumnSpec;

/// Central differences: (f(x + h) - f(x - h)) / 2h has truncation error h^2 f'''/6. With
/// h = 1e-5 and these smooth log-densities of unit-scale inputs (|f'''| well under 1e2) that is
/// under 2e-9, and rounding adds about eps |f| / h = 1e-11; 1e-6 leaves a wide margin while
/// still catching any wrong term (which would be off by O(1)).
fn assert_matches_finite_differences(f: &Family, phi: &[f64], a: &[f64]) {
    let theta = f.flatten();
    let mut score = vec![0.0; theta.len()];
    f.score(phi, a, &mut score).unwrap();
    let h = 1e-5;
    for k in 0..theta.len() {
        let (mut up, mut down) = (theta.clone(), theta.clone());
        up[k] += h;
        down[k] -= h;
        let fd = (f.with_flat(&up).log_density(phi, a).unwrap()
            - f.with_flat(&down).log_density(phi, a).unwrap())
            / (2.0 * h);
        assert!(
            (fd - score[k]).abs() < 1e-6,
            "component {k}: score {} vs finite difference {fd}",
            score[k]
        );
    }
}

#[test]
fn gaussian_score_matches_finite_differences() {
    let f = Family::Gaussian {
        w: vec![vec![0.3, -0.7, 0.2], vec![-0.1, 0.4, 0.9]],
        c: vec![0.05, -0.2],
        log_sigma: vec![(0.6f64).ln(), (1.3f64).ln()],
        learn_log_sigma: true,
    };
    assert_matches_finite_differences(&f, &[0.5, -1.2, 2.0], &[0.8, -0.4]);
    let Family::Gaussian {
        w, c, log_sigma, ..
    } = f
    else {
        unreachable!()
    };
    let fixed = Family::Gaussian {
        w,
        c,
        log_sigma,
        learn_log_sigma: false,
    };
    assert_eq!(fixed.flatten().len(), 2 * 3 + 2);
    assert_matches_finite_differences(&fixed, &[0.5, -1.2, 2.0], &[0.8, -0.4]);
}

#[test]
fn softmax_score_matches_finite_differences() {
    let f = Family::Softmax {
        theta: vec![
            vec![1.0, 0.0, -0.5],
            vec![0.0, 1.0, 0.3],
            vec![0.5, 0.5, 0.0],
        ],
    };
    for a in [0.0, 1.0, 2.0] {
        assert_matches_finite_differences(&f, &[0.7, -1.1, 1.0], &[a]);
    }
}

#[test]
fn bernoulli_score_matches_finite_differences() {
    let f = Family::Bernoulli {
        w: vec![1.6, 0.2, -2.0],
        c: -1.0,
    };
    for a in [0.0, 1.0] {
        assert_matches_finite_differences(&f, &[0.4, 0.9, 0.3], &[a]);
    }
}

// Sutton and Barto (2018), "Reinforcement Learning: An Introduction", 2nd ed., section 13.7:
// for pi(a|s) = N(mu, sigma^2), grad of the mean parameters = (a - mu) / sigma^2 x_mu(s) and
// grad of the log standard deviation parameters = ((a - mu)^2 / sigma^2 - 1) x_sigma(s).
// Worked: phi = [1, 2], W = [[0.5, -0.25]], c = 0.1, sigma = 0.5, a = 1:
//   mu = 0.5 - 0.5 + 0.1 = 0.1; (a - mu) / sigma^2 = 0.9 / 0.25 = 3.6
//   dW = 3.6 * [1, 2] = [3.6, 7.2]; dc = 3.6; dlog sigma = 0.81 / 0.25 - 1 = 2.24.
#[test]
fn gaussian_closed_form_section_13_7() {
    let f = Family::Gaussian {
        w: vec![vec![0.5, -0.25]],
        c: vec![0.1],
        log_sigma: vec![(0.5f64).ln()],
        learn_log_sigma: true,
    };
    let mut s = vec![0.0; 4];
    f.score(&[1.0, 2.0], &[1.0], &mut s).unwrap();
    for (got, want) in s.iter().zip([3.6, 7.2, 3.6, 2.24]) {
        assert!((got - want).abs() < 1e-12, "{s:?}");
    }
}

// Sutton and Barto (2018), eq. 13.9: grad ln pi(a|s) = x(s, a) - sum_b pi(b|s) x(s, b). With
// linear preferences theta_b . phi, x(s, b) is phi placed in block b. Worked: theta =
// [[1, 0], [0, 1]], phi = [1, 2]: preferences [1, 2], pi = [1/(1+e), e/(1+e)] =
// [0.268941421, 0.731058579]; for a = 1 the score is [-pi_0 phi, (1 - pi_1) phi] =
// [-0.268941421, -0.537882842, 0.268941421, 0.537882842].
#[test]
fn softmax_closed_form_eq_13_9() {
    let f = Family::Softmax {
        theta: vec![vec![1.0, 0.0], vec![0.0, 1.0]],
    };
    let mut s = vec![0.0; 4];
    f.score(&[1.0, 2.0], &[1.0], &mut s).unwrap();
    let p0 = 1.0 / (1.0 + std::f64::consts::E);
    for (got, want) in s.iter().zip([-p0, -2.0 * p0, p0, 2.0 * p0]) {
        assert!((got - want).abs() < 1e-12, "{s:?}");
    }
    assert!((p0 - 0.268941421).abs() < 1e-9);
}

#[test]
fn discrete_actions_out_of_range_are_errors() {
    let f = Family::Softmax {
        theta: vec![vec![1.0], vec![0.0]],
    };
    let mut s = vec![0.0; 2];
    assert!(
        f.score(&[1.0], &[2.0], &mut s)
            .unwrap_err()
            .contains("outside the discrete range 0..1")
    );
    assert!(f.score(&[1.0], &[0.5], &mut s).is_err());
    let b = Family::Bernoulli {
        w: vec![1.0],
        c: 0.0,
    };
    assert!(b.score(&[1.0], &[-1.0], &mut s).is_err());
}

fn schema(headers: &[&str]) -> Schema {
    Schema::resolve(
        &ColumnSpec::default(),
        headers.iter().map(|s| s.to_string()).collect(),
        "log.csv",
    )
    .unwrap()
}

#[test]
fn policy_files_are_validated() {
    let s = schema(&["episode", "reward", "obs_0", "obs_1", "act_0", "act_1"]);
    let ok = r#"{"schema": "gradaudit.policy/1", "family": "gaussian_linear", "features": ["obs_0", "obs_1"],
                 "actions": ["act_0", "act_1"], "W": [[1, 0], [0, 1]], "c": [0, 0], "log_sigma": [0, 0]}"#;
    let p = Policy::from_json(ok, "p.json", &s).unwrap();
    assert_eq!(p.dim(), 8);
    assert_eq!(p.parameters[1], "W[0,1]");
    assert_eq!(p.parameters[7], "log_sigma[1]");
    let err = |text: &str| {
        Policy::from_json(text, "p.json", &s)
            .unwrap_err()
            .to_string()
    };
    assert!(
        err(&ok.replace("gaussian_linear", "gaussian_mixture"))
            .contains("unknown policy family 'gaussian_mixture'")
    );
    assert!(
        err(&ok.replace("[[1, 0], [0, 1]]", "[[1, 0, 3], [0, 1, 4]]"))
            .contains("row 0 has 3 entries, expected 2")
    );
    assert!(err(&ok.replace("\"obs_1\"]", "\"obs_9\"]")).contains("obs column 'obs_9'"));
    assert!(
        err(&ok.replace("\"log_sigma\": [0, 0]", "\"sigma\": [1, 0]")).contains("must be positive")
    );
    assert!(
        err(&ok.replace("\"c\": [0, 0]", "\"c\": [0]")).contains("\"c\" has 1 entries, expected 2")
    );
    assert!(err(&ok.replace("gradaudit.policy/1", "v2")).contains("schema is 'v2'"));
    assert!(err("{\"schema\": ").contains("p.json, line 1"));
}

// The demo logs were written by examples/make_rollouts with exact score columns; the policy
// files beside them must reproduce those scores from the obs and act columns alone (to 1e-9:
// the logged scores are printed with round-trip precision, so only the order of floating-point
// operations differs).
#[test]
fn demo_policy_files_reproduce_the_logged_scores() {
    use crate::log::{LogReader, Progress, ReadOptions};
    for name in ["docking_rover", "parcel_diverter"] {
        let dir = concat!(env!("CARGO_MANIFEST_DIR"), "/demo-data/");
        let opts = ReadOptions {
            progress: Progress::Hidden,
            ..ReadOptions::default()
        };
        let mut r = LogReader::open(&format!("{dir}{name}.csv"), &opts).unwrap();
        let p = Policy::load(&format!("{dir}{name}.policy.json"), r.schema()).unwrap();
        assert_eq!(p.dim(), r.schema().score_dim(), "{name}");
        let (mut steps, mut worst) = (0, 0.0f64);
        while let Some(ep) = r.next_episode().unwrap() {
            let mut mine = ep.clone();
            p.score_episode(&mut mine, name, ep.first_line).unwrap();
            for (a, b) in mine.scores.iter().zip(&ep.scores) {
                worst = worst.max((a - b).abs());
            }
            steps += ep.len();
        }
        assert!(steps > 1000);
        assert!(worst < 1e-9, "{name}: largest difference {worst}");
    }
}
