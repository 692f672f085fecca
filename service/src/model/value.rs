//! Exact numbers from text: integers, decimals, scientific notation, fractions and percentages
//! become `BigRational`s with no rounding (`0.1` is exactly 1/10).

use num_bigint::BigInt;
use num_rational::BigRational;
use num_traits::{One, Zero};

/// Longest numeral accepted, in characters. Far beyond any meaningful probability, short enough
/// that a hostile 100,000-digit number is refused before any arithmetic is done on it.
pub const MAX_NUMERAL_CHARS: usize = 400;

/// Largest decimal exponent accepted (`1e999999` would otherwise allocate a million digits).
pub const MAX_EXPONENT: i64 = 400;

/// Reads an exact rational from its text.
///
/// Accepts `"3"`, `"-0.125"`, `"2.5e-3"`, `"1/6"`, `"0.6%"`, with optional surrounding spaces.
///
/// # Errors
/// A message saying why the text is not a number, or too long or too large to accept.
pub fn parse_exact(text: &str) -> Result<BigRational, String> {
    let trimmed = text.trim();
    if trimmed.is_empty() {
        return Err("expected a number, found an empty string".into());
    }
    if trimmed.len() > MAX_NUMERAL_CHARS {
        return Err(format!(
            "number is {} characters long; at most {MAX_NUMERAL_CHARS} are accepted",
            trimmed.len()
        ));
    }
    if let Some(percent) = trimmed.strip_suffix('%') {
        return parse_decimal(percent.trim_end()).map(|v| v / BigInt::from(100));
    }
    if let Some((numerator, denominator)) = trimmed.split_once('/') {
        let numerator = parse_decimal(numerator.trim())?;
        let denominator = parse_decimal(denominator.trim())?;
        if denominator.is_zero() {
            return Err(format!("'{trimmed}' divides by zero"));
        }
        return Ok(numerator / denominator);
    }
    parse_decimal(trimmed)
}

/// Reads `[+-]digits[.digits][(e|E)[+-]digits]`.
fn parse_decimal(text: &str) -> Result<BigRational, String> {
    let not_a_number = || {
        format!(
            "'{text}' is not a number (write an integer, decimal, scientific number, \
             fraction such as \"1/6\", or percentage such as \"0.6%\")"
        )
    };
    let (negative, unsigned) = match text.as_bytes().first() {
        Some(b'-') => (true, &text[1..]),
        Some(b'+') => (false, &text[1..]),
        _ => (false, text),
    };
    let (mantissa, exponent) = match unsigned.find(['e', 'E']) {
        Some(at) => (&unsigned[..at], Some(&unsigned[at + 1..])),
        None => (unsigned, None),
    };
    let (whole, fraction) = mantissa.split_once('.').unwrap_or((mantissa, ""));
    let all_digits = |s: &str| s.bytes().all(|b| b.is_ascii_digit());
    if (whole.is_empty() && fraction.is_empty()) || !all_digits(whole) || !all_digits(fraction) {
        return Err(not_a_number());
    }
    let mut exponent: i64 = match exponent {
        None => 0,
        Some(e) => {
            let digits = e.strip_prefix(['+', '-']).unwrap_or(e);
            if digits.is_empty() || !all_digits(digits) {
                return Err(not_a_number());
            }
            match e.parse::<i64>() {
                Ok(v) if v.abs() <= MAX_EXPONENT => v,
                _ => {
                    return Err(format!(
                        "exponent in '{text}' is out of range: at most {MAX_EXPONENT} in magnitude"
                    ))
                }
            }
        }
    };
    exponent -= fraction.len() as i64;
    if let Some(value) = small_decimal(whole, fraction, exponent, negative) {
        return Ok(value);
    }
    let digits = format!("{whole}{fraction}");
    let mut numerator: BigInt = digits.parse().map_err(|_| not_a_number())?;
    if negative {
        numerator = -numerator;
    }
    let scale = BigInt::from(10).pow(exponent.unsigned_abs() as u32);
    Ok(if exponent >= 0 {
        BigRational::from_integer(numerator * scale)
    } else {
        BigRational::new(numerator, scale)
    })
}

/// `±digits × 10^exponent` without big-number arithmetic when the digits fit a `u64` and the
/// power of ten does too (the common case: short decimals), already in lowest terms.
fn small_decimal(
    whole: &str,
    fraction: &str,
    exponent: i64,
    negative: bool,
) -> Option<BigRational> {
    if whole.len() + fraction.len() > 18 || !(-19..=19).contains(&exponent) {
        return None;
    }
    let mut mantissa: u64 = 0;
    for b in whole.bytes().chain(fraction.bytes()) {
        mantissa = mantissa * 10 + u64::from(b - b'0');
    }
    let power = 10u64.pow(exponent.unsigned_abs() as u32);
    let (numerator, denominator) = if exponent >= 0 {
        (u128::from(mantissa) * u128::from(power), 1u128)
    } else {
        let common = num_integer::gcd(mantissa, power);
        (u128::from(mantissa / common), u128::from(power / common))
    };
    let numerator = BigInt::from(numerator);
    Some(BigRational::new_raw(
        if negative { -numerator } else { numerator },
        BigInt::from(denominator),
    ))
}

/// Numerator and denominator as machine integers, when both fit in 63 bits.
fn small_parts(value: &BigRational) -> Option<(i128, i128)> {
    use num_traits::ToPrimitive;
    Some((
        i128::from(value.numer().to_i64()?),
        i128::from(value.denom().to_i64()?),
    ))
}

/// `n / d` in lowest terms (`d > 0`).
fn from_parts(n: i128, d: i128) -> BigRational {
    let common = num_integer::gcd(n, d);
    BigRational::new_raw(BigInt::from(n / common), BigInt::from(d / common))
}

/// `a + b`, in machine integers when the parts are small (the common case of short decimals and
/// small weights), which spares big-number gcds.
#[must_use]
pub fn add(a: &BigRational, b: &BigRational) -> BigRational {
    match (small_parts(a), small_parts(b)) {
        (Some((an, ad)), Some((bn, bd))) => from_parts(an * bd + bn * ad, ad * bd),
        _ => a + b,
    }
}

/// `a / b` for `b ≠ 0`, in machine integers when the parts are small.
#[must_use]
pub fn divide(a: &BigRational, b: &BigRational) -> BigRational {
    match (small_parts(a), small_parts(b)) {
        (Some((an, ad)), Some((bn, bd))) => {
            let (n, d) = (an * bd, ad * bn);
            if d < 0 {
                from_parts(-n, -d)
            } else {
                from_parts(n, d)
            }
        }
        _ => a / b,
    }
}

/// The exact text of a rational: `"n"` for integers, `"n/d"` otherwise (lowest terms).
#[must_use]
pub fn exact_text(value: &BigRational) -> String {
    if value.denom().is_one() {
        value.numer().to_string()
    } else {
        format!("{}/{}", value.numer(), value.denom())
    }
}

/// The nearest double to a rational (0 for values too small to represent, saturating at the
/// largest finite double).
#[must_use]
pub fn to_f64(value: &BigRational) -> f64 {
    use num_traits::ToPrimitive;
    // Both parts exact in a double: one correctly rounded division.
    const EXACT_IN_DOUBLE: u64 = 1 << 53;
    if value.numer().bits() <= 53 && value.denom().bits() <= 53 {
        if let (Some(n), Some(d)) = (value.numer().to_i64(), value.denom().to_u64()) {
            if n.unsigned_abs() <= EXACT_IN_DOUBLE && d <= EXACT_IN_DOUBLE {
                return n as f64 / d as f64;
            }
        }
    }
    match value.to_f64() {
        Some(v) if v.is_finite() => v,
        Some(v) if v > 0.0 => f64::MAX,
        Some(_) => f64::MIN,
        None => 0.0,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rational(n: i64, d: i64) -> BigRational {
        BigRational::new(n.into(), d.into())
    }

    #[test]
    fn reads_every_accepted_form_exactly() {
        assert_eq!(parse_exact("0.1").unwrap(), rational(1, 10));
        assert_eq!(parse_exact("3").unwrap(), rational(3, 1));
        assert_eq!(parse_exact(" -0.125 ").unwrap(), rational(-1, 8));
        assert_eq!(parse_exact("2.5e-3").unwrap(), rational(1, 400));
        assert_eq!(parse_exact("1E2").unwrap(), rational(100, 1));
        assert_eq!(parse_exact("1/6").unwrap(), rational(1, 6));
        assert_eq!(parse_exact("0.6%").unwrap(), rational(3, 500));
        assert_eq!(parse_exact(".5").unwrap(), rational(1, 2));
        assert_eq!(parse_exact("5.").unwrap(), rational(5, 1));
        assert_eq!(parse_exact("+4/-8").unwrap(), rational(-1, 2));
    }

    #[test]
    fn refuses_what_is_not_a_number() {
        for bad in [
            "", "abc", "1/0", "0x10", "1e", "1e+", "--1", ".", "1.2.3", "1//2", "%", "e5",
        ] {
            assert!(parse_exact(bad).is_err(), "{bad:?} was accepted");
        }
    }

    #[test]
    fn refuses_huge_numbers_without_computing_them() {
        assert!(parse_exact("1e999999").unwrap_err().contains("exponent"));
        assert!(parse_exact(&"9".repeat(100_000))
            .unwrap_err()
            .contains("characters"));
        assert!(parse_exact("1e-400").is_ok());
    }

    #[test]
    fn writes_lowest_terms() {
        assert_eq!(exact_text(&rational(2, 6)), "1/3");
        assert_eq!(exact_text(&rational(-10, 4)), "-5/2");
        assert_eq!(exact_text(&rational(0, 7)), "0");
        assert_eq!(to_f64(&rational(1, 3)), 1.0 / 3.0);
    }
}
