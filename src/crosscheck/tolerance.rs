//! How far a logged column may sit from the f64 reference and still agree.
//!
//! A training stack usually computes in float32 (unit roundoff u32 = 2^-24 ~ 6e-8) and may log
//! with fewer digits. The precision `u` of a check is the coarsest of: u32; the relative
//! half-unit of the last digit of the checked column and of the rewards and values it was
//! computed from (the shortest decimal text of each logged number, 0.5 x 10^(1-d) for d
//! significant digits; a column whose every value is a float32 counts as u32).
//!
//! A first-order rounding bound for the recursion: each step adds at most 3 rounded operations
//! on terms bounded by M_t, and carries the rounding of the decayed sum (M2_t = sum_l decay^l
//! M_{t+l}); a decay (gamma lambda) itself rounded to float32 adds at most another u M2_t per
//! step. So the step's tolerance is
//!
//! ```text
//! tol_t = 2 u (3 M_t + 4 M2_t) + 2 u |x_t|
//! ```
//!
//! (M_t, M2_t from reference.rs; x_t the logged value, for its own rounding), a factor 2 of
//! slack over the bound. `--tolerance ABS` replaces it by one absolute bound for every step.

use serde::Serialize;

/// float32's unit roundoff, 2^-24.
pub const U32: f64 = 5.960_464_477_539_063e-8;

/// The precision found in a column: float32 values, or the most significant digits any of
/// its numbers needs.
#[derive(Debug, Clone, Copy, PartialEq, Serialize)]
pub struct Precision {
    /// Every value is exactly a float32.
    pub float32: bool,
    /// The most significant digits a value needs to read back exactly (1 to 17).
    pub digits: u32,
}

impl Precision {
    /// The relative precision: u32 for float32 values, else half a unit of the last digit.
    pub fn unit(self) -> f64 {
        if self.float32 {
            U32
        } else {
            0.5 * 10f64.powi(1 - self.digits as i32)
        }
    }

    pub fn describe(self) -> String {
        if self.float32 {
            "float32 values".into()
        } else {
            format!("{} significant digits", self.digits)
        }
    }
}

/// The shortest number of significant digits that reads `x` back exactly: the mantissa of
/// Rust's `{:e}` formatting, which prints the shortest text that round-trips.
fn digits(x: f64) -> u32 {
    let text = format!("{x:e}");
    let mantissa = text.split('e').next().unwrap_or("");
    mantissa.bytes().filter(u8::is_ascii_digit).count().max(1) as u32
}

/// The precision of a column of values.
pub fn precision<'a>(values: impl IntoIterator<Item = &'a f64>) -> Precision {
    let mut float32 = true;
    let mut most = 1;
    for &x in values {
        float32 &= (x as f32) as f64 == x;
        // A float32's shortest decimal has at most 9 digits; others need looking at.
        most = most.max(digits(x));
    }
    Precision {
        float32,
        digits: most,
    }
}

/// How the tolerance was chosen, for the report.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Tolerance {
    /// `data` (from the precision and magnitudes) or `flag` (--tolerance).
    pub source: &'static str,
    /// The relative precision u used (None with --tolerance).
    pub unit: Option<f64>,
    /// What set u: the checked column's, the inputs' or float32 arithmetic.
    pub column_precision: String,
    pub input_precision: String,
    /// The smallest and largest per-step tolerance (None when one overflowed f64).
    pub min: Option<f64>,
    pub max: Option<f64>,
}

/// The per-step rule: a fixed bound, or the data-derived formula with precision `unit`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Rule {
    Fixed(f64),
    Data { unit: f64 },
}

impl Rule {
    /// The data rule's precision: the coarsest of float32 arithmetic and the columns'.
    pub fn from_data(column: Precision, inputs: Precision) -> Rule {
        Rule::Data {
            unit: U32.max(column.unit()).max(inputs.unit()),
        }
    }

    /// The tolerance of one step with magnitudes (m, m2) and logged value x.
    pub fn at(self, m: f64, m2: f64, x: f64) -> f64 {
        match self {
            Rule::Fixed(t) => t,
            Rule::Data { unit } => {
                2.0 * unit * (3.0 * m + 4.0 * m2) + 2.0 * unit * x.abs() + f64::MIN_POSITIVE
            }
        }
    }

    pub fn unit(self) -> Option<f64> {
        match self {
            Rule::Fixed(_) => None,
            Rule::Data { unit } => Some(unit),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn digits_and_float32_are_read_from_the_values() {
        let p = precision(&[0.5, 1.25, -3.0]);
        assert!(p.float32);
        assert_eq!(p.unit(), U32);
        let p = precision(&[0.1, 2.34567]);
        assert!(!p.float32);
        assert_eq!(p.digits, 6);
        assert!((p.unit() - 5e-6).abs() < 1e-18);
        // A float32 printed in full (0.1f32 = 0.100000001490116...) is still float32.
        let p = precision(&[0.1f32 as f64]);
        assert!(p.float32);
        assert_eq!(precision(&[0.1 + 0.2]).digits, 17);
    }
}
