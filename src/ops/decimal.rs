//! Exact decimal arithmetic for group summaries: sums that never pass through binary floating
//! point, and means rounded once, half to even, at a documented scale.
//!
//! A value is `units / 10^scale` with `units` an i128, enough for 38 significant digits: a sum
//! of a million amounts with 18 fraction digits still fits. A sum that would not fit is an
//! error, never a silent wrap.

use std::cmp::Ordering;

/// The fraction digits a mean is given (at least; more when the values have more).
pub const MEAN_SCALE: u32 = 6;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Decimal {
    units: i128,
    scale: u32,
}

fn pow10(n: u32) -> Option<i128> {
    10i128.checked_pow(n)
}

impl Decimal {
    /// Parses a plain number (`[+-]digits[.digits]`, as `number` writes them).
    pub fn parse(s: &str) -> Option<Decimal> {
        let (neg, body) = match s.as_bytes().first() {
            Some(b'-') => (true, &s[1..]),
            Some(b'+') => (false, &s[1..]),
            _ => (false, s),
        };
        let (int, frac) = body.split_once('.').unwrap_or((body, ""));
        if (int.is_empty() && frac.is_empty())
            || !int.bytes().all(|b| b.is_ascii_digit())
            || !frac.bytes().all(|b| b.is_ascii_digit())
        {
            return None;
        }
        let mut units: i128 = 0;
        for b in int.bytes().chain(frac.bytes()) {
            units = units.checked_mul(10)?.checked_add(i128::from(b - b'0'))?;
        }
        Some(Decimal {
            units: if neg { -units } else { units },
            scale: u32::try_from(frac.len()).ok()?,
        })
    }

    fn rescaled(self, scale: u32) -> Option<i128> {
        self.units
            .checked_mul(pow10(scale.checked_sub(self.scale)?)?)
    }

    /// The exact sum, or `None` when it does not fit.
    pub fn checked_add(self, other: Decimal) -> Option<Decimal> {
        let scale = self.scale.max(other.scale);
        Some(Decimal {
            units: self.rescaled(scale)?.checked_add(other.rescaled(scale)?)?,
            scale,
        })
    }

    /// `self / n` rounded half to even at `max(MEAN_SCALE, self.scale)` fraction digits.
    pub fn mean(self, n: u64) -> Option<Decimal> {
        if n == 0 {
            return None;
        }
        let scale = self.scale.max(MEAN_SCALE);
        let num = self.rescaled(scale)?;
        let n = i128::from(n);
        let (q, r) = (num / n, num % n);
        let twice = r.abs() * 2;
        let q = match twice.cmp(&n) {
            Ordering::Greater => q + num.signum(),
            Ordering::Equal if q % 2 != 0 => q + num.signum(),
            _ => q,
        };
        Some(Decimal { units: q, scale })
    }
}

impl std::fmt::Display for Decimal {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        let digits = self.units.unsigned_abs().to_string();
        let scale = self.scale as usize;
        let padded = if digits.len() <= scale {
            format!("{}{digits}", "0".repeat(scale + 1 - digits.len()))
        } else {
            digits
        };
        let (int, frac) = padded.split_at(padded.len() - scale);
        if self.units < 0 {
            f.write_str("-")?;
        }
        f.write_str(int)?;
        if scale > 0 {
            write!(f, ".{frac}")?;
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn d(s: &str) -> Decimal {
        Decimal::parse(s).unwrap()
    }

    #[test]
    fn sums_are_exact() {
        // 0.1 + 0.2 is 0.3 exactly (in binary floating point it is 0.30000000000000004).
        assert_eq!(d("0.1").checked_add(d("0.2")).unwrap().to_string(), "0.3");
        assert_eq!(
            d("1204.50").checked_add(d("-5.00")).unwrap().to_string(),
            "1199.50"
        );
        assert_eq!(
            d("-0.05").checked_add(d("0.01")).unwrap().to_string(),
            "-0.04"
        );
        assert_eq!(d("7").checked_add(d(".5")).unwrap().to_string(), "7.5");
        // i128::MAX, the largest sum that fits.
        let big = d("170141183460469231731687303715884105727");
        assert!(big.checked_add(d("1")).is_none());
    }

    #[test]
    fn means_round_half_to_even() {
        assert_eq!(d("10").mean(4).unwrap().to_string(), "2.500000");
        assert_eq!(d("2").mean(3).unwrap().to_string(), "0.666667");
        // 0.0000005 exactly: half, rounded to the even neighbour 0.000000.
        assert_eq!(d("0.000001").mean(2).unwrap().to_string(), "0.000000");
        assert_eq!(d("0.000003").mean(2).unwrap().to_string(), "0.000002");
        assert_eq!(d("-2").mean(3).unwrap().to_string(), "-0.666667");
    }
}
