//! Exporter tests on a small hand-built report.

use super::table::num;

#[test]
fn numbers_keep_four_significant_digits() {
    assert_eq!(num(0.0), "0");
    assert_eq!(num(1234.5678), "1235");
    assert_eq!(num(0.012344), "0.01234");
    assert_eq!(num(12.0), "12.00");
    assert_eq!(num(123456.0), "1.235e5");
    assert_eq!(num(-2.5e-7), "-2.500e-7");
}
