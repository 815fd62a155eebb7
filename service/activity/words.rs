//! Plain words for a p-value (METHODS 7): "about once in 2,000 nights".
//!
//! Role: turns an upper-tail probability into the phrase a landholder
//! reads; the exact figure stays in the evidence.
//!
//! Rounding rule, for `N = 1 / p`:
//! - `p > 0.5`: "on most {label}";
//! - `N > 1,000,000` (including `p = 0` from underflow): "less than once in
//!   a million {label}";
//! - otherwise N is rounded to one significant figure, halves up
//!   with a 1e-9 tolerance for binary rounding of 1 / p
//!   (1,923 -> 2,000; 2,500 -> 3,000; 33.3 -> 30; 2.5 -> 3), written with
//!   thousands separators: "about once in {N} {label}".
//!
//! `label` is the plural name of the window ("nights", "weeks").

/// The phrase for `p_value`, or `None` when it is not a probability.
pub fn chance_in_words(p_value: f64, window_label: &str) -> Option<String> {
    if !(0.0..=1.0).contains(&p_value) {
        return None;
    }
    if p_value > 0.5 {
        return Some(format!("on most {window_label}"));
    }
    if p_value < 1e-6 {
        return Some(format!("less than once in a million {window_label}"));
    }
    let n = 1.0 / p_value;
    // 10^e <= n < 10^(e+1); guard the log against rounding at powers of 10.
    let mut e = n.log10().floor() as i32;
    if 10f64.powi(e + 1) <= n {
        e += 1;
    } else if 10f64.powi(e) > n {
        e -= 1;
    }
    let scale = 10f64.powi(e);
    // Halves up; the 1e-9 absorbs binary rounding of 1 / p (1 / 0.0004 is
    // 2499.9999999999995 in f64, and is meant as 2,500).
    let mantissa = (n / scale + 0.5 + 1e-9).floor();
    let rounded = (mantissa * scale).round() as u64;
    Some(format!(
        "about once in {} {window_label}",
        thousands(rounded)
    ))
}

/// `1234567` -> `"1,234,567"`.
fn thousands(n: u64) -> String {
    let digits = n.to_string();
    let mut out = String::with_capacity(digits.len() + digits.len() / 3);
    for (i, ch) in digits.chars().enumerate() {
        if i > 0 && (digits.len() - i) % 3 == 0 {
            out.push(',');
        }
        out.push(ch);
    }
    out
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;

    #[test]
    fn worked_examples_of_the_rule() {
        // Worked from the stated rule (module docs); the first is METHODS 7's
        // own example sentence.
        let w = |p| chance_in_words(p, "nights").unwrap();
        assert_eq!(w(0.0005), "about once in 2,000 nights");
        assert_eq!(w(0.00052), "about once in 2,000 nights"); // N = 1923
        assert_eq!(w(0.0004), "about once in 3,000 nights"); // N = 2500, half up
        assert_eq!(w(0.03), "about once in 30 nights"); // N = 33.3
        assert_eq!(w(0.4), "about once in 3 nights"); // N = 2.5
        assert_eq!(w(0.5), "about once in 2 nights");
        assert_eq!(w(0.01), "about once in 100 nights");
        assert_eq!(w(0.001), "about once in 1,000 nights");
        assert_eq!(w(0.0000011), "about once in 900,000 nights"); // N = 909,091
        assert_eq!(w(0.00000104), "about once in 1,000,000 nights"); // N = 961,538
        assert_eq!(w(1e-6), "about once in 1,000,000 nights");
        assert_eq!(w(9e-7), "less than once in a million nights");
        assert_eq!(w(0.0), "less than once in a million nights");
        assert_eq!(w(0.7), "on most nights");
        assert_eq!(
            chance_in_words(0.02, "weeks").unwrap(),
            "about once in 50 weeks"
        );
        assert_eq!(chance_in_words(f64::NAN, "nights"), None);
        assert_eq!(chance_in_words(1.5, "nights"), None);
        assert_eq!(chance_in_words(-0.1, "nights"), None);
    }

    #[test]
    fn thousands_separators() {
        assert_eq!(thousands(0), "0");
        assert_eq!(thousands(999), "999");
        assert_eq!(thousands(1000), "1,000");
        assert_eq!(thousands(1_000_000), "1,000,000");
    }
}
