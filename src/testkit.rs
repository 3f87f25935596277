//! Test support shared by the library's unit tests: in-memory logs and simulated problems with
//! known answers.

use crate::log::{LogReader, Progress, ReadOptions};
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::fmt::Write;

/// A reader over CSV text held in memory.
pub fn reader(text: &str) -> LogReader {
    let opts = ReadOptions {
        progress: Progress::Hidden,
        ..ReadOptions::default()
    };
    LogReader::from_reader(
        Box::new(std::io::Cursor::new(text.as_bytes().to_vec())),
        "test.csv",
        &opts,
        None,
    )
    .expect("valid log")
}

/// Scalar linear-quadratic problem: x_{t+1} = x_t + u_t, u_t ~ N(k x_t, sigma^2),
/// x_0 ~ N(0, 1), r_t = -(x_t^2 + u_t^2), horizon h, terminated at the horizon.
pub struct Lq {
    pub k: f64,
    pub sigma: f64,
    pub h: usize,
}

impl Lq {
    /// True state values V_t(x) = -(a_t x^2 + b_t), by the backward recursion
    /// a_t = (1 + k^2) + (1 + k)^2 a_{t+1}, b_t = sigma^2 (1 + a_{t+1}) + b_{t+1},
    /// a_h = b_h = 0 (E r_t = -((1 + k^2) x^2 + sigma^2); E x_{t+1}^2 = (1 + k)^2 x^2 + sigma^2).
    pub fn value_coefficients(&self) -> Vec<(f64, f64)> {
        let mut out = vec![(0.0, 0.0); self.h + 1];
        for t in (0..self.h).rev() {
            let (a1, b1) = out[t + 1];
            out[t] = (
                1.0 + self.k * self.k + (1.0 + self.k).powi(2) * a1,
                self.sigma * self.sigma * (1.0 + a1) + b1,
            );
        }
        out
    }

    /// A log of `n` episodes with a value column equal to `critic_scale` times the true value
    /// (1.0: an exact critic) and the exact score d/dk log pi = (u - k x) x / sigma^2.
    pub fn log(&self, n: usize, critic_scale: f64, seed: u64) -> String {
        let coef = self.value_coefficients();
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
        let mut text = String::from("episode,step,reward,terminated,value,score_0\n");
        for e in 0..n {
            let mut x: f64 = StandardNormal.sample(&mut rng);
            for (t, (a, b)) in coef.iter().take(self.h).enumerate() {
                let z: f64 = StandardNormal.sample(&mut rng);
                let u = self.k * x + self.sigma * z;
                let score = (u - self.k * x) * x / (self.sigma * self.sigma);
                let v = -critic_scale * (a * x * x + b);
                writeln!(
                    text,
                    "{e},{t},{},{},{v},{score}",
                    -(x * x + u * u),
                    u8::from(t + 1 == self.h)
                )
                .unwrap();
                x += u;
            }
        }
        text
    }
}
