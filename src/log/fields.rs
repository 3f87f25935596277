//! Parsing one CSV field into the typed value its column role needs, without allocating.

/// Why a field could not be read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum FieldProblem {
    Empty,
    NotANumber,
    NotFinite,
    NotABoolean,
    NotAnInteger,
}

impl FieldProblem {
    pub fn describe(self, text: &[u8]) -> String {
        let shown = shown(text);
        match self {
            FieldProblem::Empty => "the field is empty; a number is required here".to_string(),
            FieldProblem::NotANumber => format!("cannot read \"{shown}\" as a number"),
            FieldProblem::NotFinite => {
                format!("\"{shown}\" is not a finite number (NaN and infinity are rejected)")
            }
            FieldProblem::NotABoolean => {
                format!("cannot read \"{shown}\" as a boolean; use 0/1 or true/false")
            }
            FieldProblem::NotAnInteger => format!("cannot read \"{shown}\" as an integer step"),
        }
    }
}

/// The field text as shown in a message: lossy UTF-8, cut to 40 characters.
pub fn shown(text: &[u8]) -> String {
    let s = String::from_utf8_lossy(text);
    let mut out: String = s.chars().take(40).collect();
    if s.chars().count() > 40 {
        out.push_str("...");
    }
    out
}

fn trim(text: &[u8]) -> &[u8] {
    text.trim_ascii()
}

/// A finite f64. Surrounding ASCII whitespace is accepted.
#[inline]
pub fn number(text: &[u8]) -> Result<f64, FieldProblem> {
    let t = trim(text);
    if t.is_empty() {
        return Err(FieldProblem::Empty);
    }
    // Byte-level, correctly rounded parse (no UTF-8 check needed: non-ASCII is rejected).
    let v: f64 = fast_float2::parse(t).map_err(|_| FieldProblem::NotANumber)?;
    if v.is_finite() {
        Ok(v)
    } else {
        Err(FieldProblem::NotFinite)
    }
}

/// A finite f64, or `None` for an empty field (for columns that may be blank on some rows).
#[inline]
pub fn optional_number(text: &[u8]) -> Result<Option<f64>, FieldProblem> {
    if trim(text).is_empty() {
        Ok(None)
    } else {
        number(text).map(Some)
    }
}

/// 0/1/true/false in any letter case.
#[inline]
pub fn boolean(text: &[u8]) -> Result<bool, FieldProblem> {
    let t = trim(text);
    match t {
        b"0" => Ok(false),
        b"1" => Ok(true),
        _ if t.eq_ignore_ascii_case(b"true") => Ok(true),
        _ if t.eq_ignore_ascii_case(b"false") => Ok(false),
        _ => Err(FieldProblem::NotABoolean),
    }
}

/// A signed integer step index.
#[inline]
pub fn integer(text: &[u8]) -> Result<i64, FieldProblem> {
    let t = trim(text);
    if t.is_empty() {
        return Err(FieldProblem::Empty);
    }
    std::str::from_utf8(t)
        .ok()
        .and_then(|s| s.parse().ok())
        .ok_or(FieldProblem::NotAnInteger)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_accept_whitespace_and_reject_non_finite() {
        assert_eq!(number(b" 1.5e3 "), Ok(1500.0));
        assert_eq!(number(b"-0.25"), Ok(-0.25));
        assert_eq!(number(b""), Err(FieldProblem::Empty));
        assert_eq!(number(b"abc"), Err(FieldProblem::NotANumber));
        assert_eq!(number(b"NaN"), Err(FieldProblem::NotFinite));
        assert_eq!(number(b"-inf"), Err(FieldProblem::NotFinite));
        assert_eq!(number(b"1e999"), Err(FieldProblem::NotFinite));
        assert_eq!(optional_number(b"  "), Ok(None));
        assert_eq!(number("1\u{e9}".as_bytes()), Err(FieldProblem::NotANumber));
        assert_eq!(number(b"1.5.2"), Err(FieldProblem::NotANumber));
        // Correct rounding, the same as the standard library's parser (the general-purpose
        // reference here) on hard cases near halfway points.
        for text in [
            "0.1",
            "2.2250738585072011e-308",
            "9007199254740993",
            "1.7976931348623157e308",
        ] {
            assert_eq!(
                number(text.as_bytes()),
                Ok(text.parse::<f64>().unwrap()),
                "{text}"
            );
        }
    }

    #[test]
    fn booleans_in_any_case() {
        for (t, v) in [("0", false), ("1", true), ("TRUE", true), ("False", false)] {
            assert_eq!(boolean(t.as_bytes()), Ok(v), "{t}");
        }
        for t in ["yes", "2", "", "t"] {
            assert_eq!(boolean(t.as_bytes()), Err(FieldProblem::NotABoolean), "{t}");
        }
    }

    #[test]
    fn integers() {
        assert_eq!(integer(b"17"), Ok(17));
        assert_eq!(integer(b"1.5"), Err(FieldProblem::NotAnInteger));
    }
}
