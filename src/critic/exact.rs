//! Exactly rounded sums whose result does not depend on the order of the terms.
//!
//! Floating-point addition is not associative, so a running sum over episodes in the order
//! they end (which depends on how the rows of a log are interleaved) changes in its last bits
//! with the row order. [`ExactSum`] keeps the sum exactly, as a list of non-overlapping
//! partials (Shewchuk 1997, "Adaptive precision floating-point arithmetic and fast robust
//! geometric predicates", Discrete Comput. Geom. 18, the GROW-EXPANSION step built on the
//! error-free TWO-SUM of Knuth, TAOCP vol. 2, 4.2.2, Theorem B), and rounds once at the end
//! (the final rounding of CPython's `math.fsum`, which corrects the half-way case). The exact
//! sum of a set of terms is one number whatever their order, and its correct rounding is one
//! double, so the result is bit-identical under any permutation.
//!
//! Cost: a few additions per term (as many as there are partials, typically 1 to 4). Used for
//! sums across episodes (critic sums, explained variance); sums inside an episode stay plain
//! f64, as the steps of an episode come in a fixed order.

/// An exactly kept sum of f64 terms (see the module doc).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct ExactSum {
    /// Non-overlapping partials, increasing in magnitude; their exact sum is the sum.
    partials: Vec<f64>,
    /// Sum of the non-finite terms or of partials that overflowed (then the result).
    special: Option<f64>,
}

/// Bytes one sum usually holds (the struct and a few partials), for memory budgets.
pub const TYPICAL_BYTES: u128 = 40 + 8 * 8;

impl ExactSum {
    pub fn add(&mut self, mut x: f64) {
        if !x.is_finite() {
            self.special = Some(self.special.unwrap_or(0.0) + x);
            return;
        }
        let mut i = 0;
        for j in 0..self.partials.len() {
            let mut y = self.partials[j];
            if x.abs() < y.abs() {
                std::mem::swap(&mut x, &mut y);
            }
            let hi = x + y;
            if !hi.is_finite() {
                self.special = Some(self.special.unwrap_or(0.0) + hi);
                self.partials.clear();
                return;
            }
            let lo = y - (hi - x);
            if lo != 0.0 {
                self.partials[i] = lo;
                i += 1;
            }
            x = hi;
        }
        self.partials.truncate(i);
        self.partials.push(x);
    }

    /// Adds every term of `other` (exactly).
    pub fn merge(&mut self, other: &ExactSum) {
        for &p in &other.partials {
            self.add(p);
        }
        if let Some(s) = other.special {
            self.add(s);
        }
    }

    /// Subtracts every term of `other` (exactly): the sum of the terms not in `other`.
    pub fn subtract(&mut self, other: &ExactSum) {
        for &p in &other.partials {
            self.add(-p);
        }
        if let Some(s) = other.special {
            self.add(-s);
        }
    }

    /// The sum's state as numbers, for shard files: `[flag, special, partials...]`, flag 1 when
    /// a non-finite term or overflow is held in `special` (else both 0).
    pub fn to_parts(&self) -> Vec<f64> {
        let mut out = vec![
            f64::from(u8::from(self.special.is_some())),
            self.special.unwrap_or(0.0),
        ];
        out.extend(&self.partials);
        out
    }

    /// The sum [`ExactSum::to_parts`] described, or None when `parts` cannot be one (too short,
    /// a bad flag, or partials that are not finite).
    pub fn from_parts(parts: &[f64]) -> Option<ExactSum> {
        let (flag, special, partials) = match parts {
            [f, s, rest @ ..] => (*f, *s, rest),
            _ => return None,
        };
        if !(flag == 0.0 || flag == 1.0) || partials.iter().any(|p| !p.is_finite()) {
            return None;
        }
        // Re-adding the partials keeps the invariant (non-overlapping, increasing) whatever the
        // file held; for a file this build wrote it gives back the same partials.
        let mut sum = ExactSum::default();
        for &p in partials {
            sum.add(p);
        }
        if flag == 1.0 {
            sum.special = Some(special);
        }
        Some(sum)
    }

    /// The exact sum, correctly rounded to the nearest double (ties to even).
    pub fn value(&self) -> f64 {
        if let Some(s) = self.special {
            return s;
        }
        let p = &self.partials;
        let Some(&top) = p.last() else {
            return 0.0;
        };
        let (mut hi, mut lo) = (top, 0.0);
        let mut n = p.len() - 1;
        while n > 0 {
            let (x, y) = (hi, p[n - 1]);
            n -= 1;
            hi = x + y;
            lo = y - (hi - x);
            if lo != 0.0 {
                break;
            }
        }
        // Half-way case: the rounding of hi + lo went one way, and the partials below push
        // the exact value past the midpoint the same way; round that way instead.
        if n > 0 && ((lo < 0.0 && p[n - 1] < 0.0) || (lo > 0.0 && p[n - 1] > 0.0)) {
            let y = lo * 2.0;
            let x = hi + y;
            if y == x - hi {
                hi = x;
            }
        }
        hi
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn sum(xs: &[f64]) -> f64 {
        let mut s = ExactSum::default();
        xs.iter().for_each(|&x| s.add(x));
        s.value()
    }

    // Python's documentation of math.fsum: sum([.1] * 10) gives 0.9999999999999999 and
    // fsum([.1] * 10) gives 1.0 (the nearest double to the exact sum of ten copies of the
    // double nearest 0.1). And the classic cancellation case: 1e100 + 1 - 1e100 = 1.
    #[test]
    fn matches_the_correctly_rounded_sum_of_published_cases() {
        assert_eq!([0.1; 10].iter().sum::<f64>(), 0.9999999999999999);
        assert_eq!(sum(&[0.1; 10]), 1.0);
        assert_eq!(sum(&[1e100, 1.0, -1e100]), 1.0);
        assert_eq!(
            sum(&[1e100, 1.0, -1e100, 1e-100, 1e50, -1.0, -1e50]),
            1e-100
        );
        // Half-way case: 1 + 2^-53 is a tie that rounds to 1 (even), and a further 2^-106
        // pushes the exact sum above the midpoint, so it must round up.
        let e = f64::EPSILON / 2.0;
        assert_eq!(sum(&[1.0, e]), 1.0);
        assert_eq!(sum(&[1.0, e, e * e]), 1.0 + f64::EPSILON);
        assert_eq!(sum(&[]), 0.0);
    }

    #[test]
    fn subtracting_a_part_gives_the_sum_of_the_rest() {
        let (mut all, mut part) = (ExactSum::default(), ExactSum::default());
        for (i, x) in [3.5, 1e-17, -2.25e10, 7.0, 1e16].iter().enumerate() {
            all.add(*x);
            if i % 2 == 0 {
                part.add(*x);
            }
        }
        all.subtract(&part);
        assert_eq!(all.value(), sum(&[1e-17, 7.0]));
    }

    proptest! {
        // Any order of the same terms gives the same double (the point of the type).
        #[test]
        fn permutations_give_bit_identical_sums(
            xs in prop::collection::vec(
                prop_oneof![-1e12..1e12f64, -1e-12..1e-12f64, -1.0..1.0f64], 0..60),
            seed in any::<u64>(),
        ) {
            let mut ys = xs.clone();
            let mut s = seed | 1;
            for i in (1..ys.len()).rev() {
                s ^= s << 13; s ^= s >> 7; s ^= s << 17;
                ys.swap(i, (s % (i as u64 + 1)) as usize);
            }
            prop_assert_eq!(sum(&xs).to_bits(), sum(&ys).to_bits());
            // Merging halves in either order equals the single sum.
            let (a, b) = xs.split_at(xs.len() / 2);
            let (mut sa, mut sb) = (ExactSum::default(), ExactSum::default());
            a.iter().for_each(|&x| sa.add(x));
            b.iter().for_each(|&x| sb.add(x));
            sb.merge(&sa);
            prop_assert_eq!(sb.value().to_bits(), sum(&xs).to_bits());
        }
    }
}
