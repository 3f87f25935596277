//! Deterministic number streams for tests: the library's unit tests and the CLI tests (which
//! reach it as `gradaudit::testing`) build their synthetic logs from this one generator rather
//! than each keeping a copy. It plays no part in any computation of the tool, so a test that
//! draws its data here still checks the tool against its own, independent arithmetic.
//!
//! xorshift64* (Vigna, "An experimental exploration of Marsaglia's xorshift generators,
//! scrambled", 2016): the state shifts 12, 25, 27, then the output is the state times
//! 0x2545F4914F6CDD1D; its top 53 bits make a double in [0, 1).

/// A seeded xorshift64* stream. The seed must not be 0 (the state would stay 0).
#[doc(hidden)]
#[derive(Debug, Clone)]
pub struct XorShift(pub u64);

impl XorShift {
    /// The next number in [0, 1).
    pub fn unit(&mut self) -> f64 {
        self.0 ^= self.0 >> 12;
        self.0 ^= self.0 << 25;
        self.0 ^= self.0 >> 27;
        (self.0.wrapping_mul(0x2545_F491_4F6C_DD1D) >> 11) as f64 / (1u64 << 53) as f64
    }

    /// The next number in [-1, 1): `2 unit - 1`, exactly (doubling is exact).
    pub fn signed(&mut self) -> f64 {
        self.unit() * 2.0 - 1.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn stream_is_xorshift64_star() {
        // The first state from seed 1, worked by hand: x ^= x >> 12 (1), x ^= x << 25
        // (0x2000001), x ^= x >> 27 (0x2000001 >> 27 = 0, so 0x2000001); output
        // 0x2000001 * 0x2545F4914F6CDD1D mod 2^64.
        let mut g = XorShift(1);
        let want = 0x2000001u64.wrapping_mul(0x2545_F491_4F6C_DD1D);
        assert_eq!(g.unit(), (want >> 11) as f64 / (1u64 << 53) as f64);
        assert_eq!(g.0, 0x2000001);
        let mut a = XorShift(7);
        let mut b = XorShift(7);
        for _ in 0..1000 {
            let (u, s) = (a.unit(), b.signed());
            assert!((0.0..1.0).contains(&u));
            assert_eq!(s, u * 2.0 - 1.0);
        }
    }
}
