//! Special functions for the spike test: `ln Γ`, the regularised incomplete
//! gamma and beta functions, and the Poisson and negative-binomial upper
//! tails built on them.
//!
//! Role: numerics only, no domain types. Tails are computed directly from the
//! incomplete functions (series or continued fraction on the side where the
//! wanted quantity is small), never as `1 - cdf`, which cancels to 0 below
//! about 1e-16. Checked against scipy.stats / scipy.special and mpmath in
//! `tests/reference/gen_activity.py` (relative error <= 1e-9 wherever the
//! value is >= 1e-300).
//!
//! Invalid arguments (NaN, negative means, shapes <= 0, probabilities outside
//! [0, 1]) give NaN rather than panicking: callers validate first.

/// Relative convergence target for series and continued fractions.
const EPS: f64 = 1e-16;
/// Guard against division by zero in Lentz's method.
const TINY: f64 = 1e-300;
/// Iteration cap. The continued fractions need O(sqrt(max(a, b))) terms near
/// the switch point, so 20 000 covers shapes far beyond any camera count.
const MAX_ITER: usize = 20_000;

/// `ln Γ(x)` for `x > 0` (NaN otherwise).
///
/// Shifts the argument up to at least 15 with the recurrence
/// `Γ(x + 1) = x Γ(x)`, then uses Stirling's series to the `x^-13` term
/// (coefficients `B_2k / (2k (2k - 1))`). Absolute error about 1e-15 for
/// moderate `x`, relative error about 1e-16 for large `x`.
pub fn ln_gamma(x: f64) -> f64 {
    if x.is_nan() || x <= 0.0 {
        return f64::NAN;
    }
    if x.is_infinite() {
        return f64::INFINITY;
    }
    let mut z = x;
    let mut product = 1.0;
    while z < 15.0 {
        product *= z;
        z += 1.0;
    }
    let inv = 1.0 / z;
    let inv2 = inv * inv;
    // Horner form of 1/12 - 1/(360 z^2) + 1/(1260 z^4) - 1/(1680 z^6)
    // + 1/(1188 z^8) - 691/(360360 z^10) + 1/(156 z^12), times 1/z.
    let series = inv
        * (1.0 / 12.0
            + inv2
                * (-1.0 / 360.0
                    + inv2
                        * (1.0 / 1260.0
                            + inv2
                                * (-1.0 / 1680.0
                                    + inv2
                                        * (1.0 / 1188.0
                                            + inv2 * (-691.0 / 360_360.0 + inv2 / 156.0))))));
    let half_ln_two_pi = 0.918_938_533_204_672_8;
    (z - 0.5) * z.ln() - z + half_ln_two_pi + series - product.ln()
}

/// `ln B(a, b) = ln Γ(a) + ln Γ(b) - ln Γ(a + b)`.
pub fn ln_beta(a: f64, b: f64) -> f64 {
    ln_gamma(a) + ln_gamma(b) - ln_gamma(a + b)
}

/// Regularised lower incomplete gamma `P(a, x) = γ(a, x) / Γ(a)`.
pub fn gamma_p(a: f64, x: f64) -> f64 {
    gamma_pq(a, x).0
}

/// Regularised upper incomplete gamma `Q(a, x) = Γ(a, x) / Γ(a)`.
pub fn gamma_q(a: f64, x: f64) -> f64 {
    gamma_pq(a, x).1
}

/// `(P(a, x), Q(a, x))`, each computed on the side where it is small.
fn gamma_pq(a: f64, x: f64) -> (f64, f64) {
    if a.is_nan() || x.is_nan() || a <= 0.0 || x < 0.0 {
        return (f64::NAN, f64::NAN);
    }
    if x == 0.0 {
        return (0.0, 1.0);
    }
    if x.is_infinite() {
        return (1.0, 0.0);
    }
    let ln_front = a * x.ln() - x - ln_gamma(a);
    if x < a + 1.0 {
        // Series: P = e^{-x} x^a / Γ(a) * sum_{n>=0} x^n / (a (a+1) ... (a+n)).
        let mut term = 1.0 / a;
        let mut sum = term;
        let mut denom = a;
        for _ in 0..MAX_ITER {
            denom += 1.0;
            term *= x / denom;
            sum += term;
            if term.abs() < sum.abs() * EPS {
                break;
            }
        }
        let p = (ln_front + sum.ln()).exp();
        (p, 1.0 - p)
    } else {
        // Continued fraction for Q (modified Lentz).
        let mut b = x + 1.0 - a;
        let mut c = 1.0 / TINY;
        let mut d = 1.0 / b;
        let mut h = d;
        for i in 1..=MAX_ITER {
            let fi = i as f64;
            let an = -fi * (fi - a);
            b += 2.0;
            d = an * d + b;
            if d.abs() < TINY {
                d = TINY;
            }
            c = b + an / c;
            if c.abs() < TINY {
                c = TINY;
            }
            d = 1.0 / d;
            let delta = d * c;
            h *= delta;
            if (delta - 1.0).abs() < EPS {
                break;
            }
        }
        let q = (ln_front + h.ln()).exp();
        (1.0 - q, q)
    }
}

/// Regularised incomplete beta `I_x(a, b)`.
pub fn beta_inc(a: f64, b: f64, x: f64) -> f64 {
    beta_inc_pair(a, b, x, 1.0 - x).0
}

/// `(I_x(a, b), 1 - I_x(a, b))` given both `x` and `y = 1 - x`.
///
/// Passing `y` separately keeps full relative precision when `x` is close
/// to 1 (the caller often knows `y` exactly, e.g. `y = b / (b + e)`). Each of
/// the pair is computed on the side where it is small.
pub fn beta_inc_pair(a: f64, b: f64, x: f64, y: f64) -> (f64, f64) {
    if a.is_nan() || b.is_nan() || x.is_nan() || y.is_nan() || a <= 0.0 || b <= 0.0 {
        return (f64::NAN, f64::NAN);
    }
    if !(0.0..=1.0).contains(&x) || !(0.0..=1.0).contains(&y) {
        return (f64::NAN, f64::NAN);
    }
    if x == 0.0 || y == 1.0 {
        return (0.0, 1.0);
    }
    if y == 0.0 || x == 1.0 {
        return (1.0, 0.0);
    }
    let ln_front = a * x.ln() + b * y.ln() - ln_beta(a, b);
    if x < (a + 1.0) / (a + b + 2.0) {
        let i = (ln_front + beta_cf(a, b, x).ln()).exp() / a;
        (i, 1.0 - i)
    } else {
        let j = (ln_front + beta_cf(b, a, y).ln()).exp() / b;
        (1.0 - j, j)
    }
}

/// Continued fraction for the incomplete beta (modified Lentz), as in the
/// standard expansion `I_x(a,b) = x^a y^b / (a B(a,b)) * 1/(1+ d1/(1+ d2/(1+...)))`.
fn beta_cf(a: f64, b: f64, x: f64) -> f64 {
    let qab = a + b;
    let qap = a + 1.0;
    let qam = a - 1.0;
    let mut c = 1.0;
    let mut d = 1.0 - qab * x / qap;
    if d.abs() < TINY {
        d = TINY;
    }
    d = 1.0 / d;
    let mut h = d;
    for m in 1..=MAX_ITER {
        let m = m as f64;
        let m2 = 2.0 * m;
        let aa = m * (b - m) * x / ((qam + m2) * (a + m2));
        d = 1.0 + aa * d;
        if d.abs() < TINY {
            d = TINY;
        }
        c = 1.0 + aa / c;
        if c.abs() < TINY {
            c = TINY;
        }
        d = 1.0 / d;
        h *= d * c;
        let aa = -(a + m) * (qab + m) * x / ((a + m2) * (qap + m2));
        d = 1.0 + aa * d;
        if d.abs() < TINY {
            d = TINY;
        }
        c = 1.0 + aa / c;
        if c.abs() < TINY {
            c = TINY;
        }
        d = 1.0 / d;
        let delta = d * c;
        h *= delta;
        if (delta - 1.0).abs() < EPS {
            break;
        }
    }
    h
}

/// `P(Y >= c)` for `Y ~ Poisson(mean)`; equals scipy `poisson.sf(c - 1, mean)`.
///
/// Uses `P(Y >= c) = P(c, mean)` (regularised lower incomplete gamma).
pub fn poisson_upper_tail(c: u64, mean: f64) -> f64 {
    if mean.is_nan() || mean < 0.0 {
        return f64::NAN;
    }
    if c == 0 {
        return 1.0;
    }
    if mean == 0.0 {
        return 0.0;
    }
    gamma_p(c as f64, mean)
}

/// `P(Y >= c)` for `Y ~ NB(r, p)` as scipy parametrises it (number of
/// failures before the `r`-th success, success probability `p`, mean
/// `r (1 - p) / p`); equals scipy `nbinom.sf(c - 1, r, p)`.
///
/// Uses `P(Y >= c) = I_{1-p}(c, r)`.
pub fn nbinom_upper_tail(c: u64, r: f64, p: f64) -> f64 {
    nbinom_upper_tail_pair(c, r, 1.0 - p, p)
}

/// As [`nbinom_upper_tail`], with `q = 1 - p` given separately so that it
/// keeps full precision (the spike test knows `q = e / (b + e)` exactly).
pub fn nbinom_upper_tail_pair(c: u64, r: f64, q: f64, p: f64) -> f64 {
    if r.is_nan() || r <= 0.0 || !(0.0..=1.0).contains(&p) || !(0.0..=1.0).contains(&q) {
        return f64::NAN;
    }
    if c == 0 {
        return 1.0;
    }
    beta_inc_pair(c as f64, r, q, p).0
}

/// Smallest count `c` with `tail(c) < alpha`, for a non-increasing tail with
/// `tail(0) = 1`. Doubling then bisection: O(log c) tail evaluations.
/// Returns `None` when `alpha` is not in (0, 1] or no such count is found
/// below 2^62 (a tail that never falls, i.e. invalid parameters).
pub fn critical_count(alpha: f64, tail: impl Fn(u64) -> f64) -> Option<u64> {
    if alpha.is_nan() || alpha <= 0.0 || alpha > 1.0 {
        return None;
    }
    // `!(t < alpha)` so that a NaN tail never counts as "below alpha".
    let below = |c: u64| tail(c) < alpha;
    if below(0) {
        return Some(0);
    }
    let mut hi: u64 = 1;
    while !below(hi) {
        if hi >= 1 << 62 {
            return None;
        }
        hi *= 2;
    }
    let mut lo = hi / 2; // not below (or 0, which is not below)
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if below(mid) {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    Some(hi)
}

/// Smallest `c` with `P(Y >= c) < alpha` for `Y ~ Poisson(mean)`.
pub fn poisson_critical_count(mean: f64, alpha: f64) -> Option<u64> {
    if mean.is_nan() || mean < 0.0 || mean.is_infinite() {
        return None;
    }
    critical_count(alpha, |c| poisson_upper_tail(c, mean))
}

/// Smallest `c` with `P(Y >= c) < alpha` for `Y ~ NB(r, p)` (scipy's
/// parametrisation).
pub fn nbinom_critical_count(r: f64, p: f64, alpha: f64) -> Option<u64> {
    if r.is_nan() || r <= 0.0 || r.is_infinite() || p.is_nan() || p <= 0.0 || p > 1.0 {
        return None;
    }
    critical_count(alpha, |c| nbinom_upper_tail(c, r, p))
}

#[cfg(test)]
#[allow(clippy::unwrap_used)]
mod tests {
    use super::*;
    use crate::activity::test_reference::{reference, rel_err};
    use proptest::prelude::*;

    #[test]
    fn ln_gamma_matches_scipy_gammaln() {
        // Reference: scipy.special.gammaln, via gen_activity.py.
        let data = reference();
        let mut worst = 0.0f64;
        for row in data["ln_gamma"].as_array().unwrap() {
            let x = row[0].as_f64().unwrap();
            let want = row[1].as_f64().unwrap();
            let got = ln_gamma(x);
            // Near the zeros of ln Γ (x = 1, 2) only absolute error is
            // meaningful; elsewhere relative.
            let err = if want.abs() < 1.0 {
                (got - want).abs()
            } else {
                rel_err(got, want)
            };
            worst = worst.max(err);
            assert!(err <= 1e-13, "ln_gamma({x}) = {got}, scipy {want}");
        }
        eprintln!("ln_gamma worst error vs scipy: {worst:e}");
    }

    #[test]
    fn poisson_tail_matches_scipy_and_mpmath() {
        // Reference: scipy.stats.poisson.sf(c - 1, mean) and mpmath (50 digits).
        let data = reference();
        let rows = data["poisson_tail"].as_array().unwrap();
        assert!(rows.len() > 100);
        let (mut worst_scipy, mut worst_mp, mut smallest) = (0.0f64, 0.0f64, 1.0f64);
        for row in rows {
            let c = row["c"].as_u64().unwrap();
            let mean = row["mean"].as_f64().unwrap();
            let scipy = row["scipy"].as_f64().unwrap();
            let mp = row["mpmath"].as_f64().unwrap();
            let got = poisson_upper_tail(c, mean);
            if mp >= 1e-300 {
                let e1 = rel_err(got, scipy);
                let e2 = rel_err(got, mp);
                worst_scipy = worst_scipy.max(e1);
                worst_mp = worst_mp.max(e2);
                smallest = smallest.min(mp);
                assert!(
                    e1 <= 1e-9,
                    "poisson c={c} mean={mean}: {got} vs scipy {scipy}"
                );
                assert!(
                    e2 <= 1e-9,
                    "poisson c={c} mean={mean}: {got} vs mpmath {mp}"
                );
            }
        }
        assert!(smallest < 1e-12, "grid must reach tails below 1e-12");
        eprintln!("poisson tail worst rel err: scipy {worst_scipy:e}, mpmath {worst_mp:e}");
    }

    #[test]
    fn nbinom_tail_matches_scipy_and_mpmath() {
        // Reference: scipy.stats.nbinom.sf(c - 1, r, p) and mpmath betainc
        // (50 digits, regularized=True).
        let data = reference();
        let rows = data["nbinom_tail"].as_array().unwrap();
        assert!(rows.len() > 100);
        let (mut worst_scipy, mut worst_mp, mut smallest) = (0.0f64, 0.0f64, 1.0f64);
        for row in rows {
            let c = row["c"].as_u64().unwrap();
            let r = row["r"].as_f64().unwrap();
            let p = row["p"].as_f64().unwrap();
            let scipy = row["scipy"].as_f64().unwrap();
            let mp = row["mpmath"].as_f64().unwrap();
            let got = nbinom_upper_tail(c, r, p);
            if mp >= 1e-300 {
                let e1 = rel_err(got, scipy);
                let e2 = rel_err(got, mp);
                worst_scipy = worst_scipy.max(e1);
                worst_mp = worst_mp.max(e2);
                smallest = smallest.min(mp);
                assert!(
                    e1 <= 1e-9,
                    "nbinom c={c} r={r} p={p}: {got} vs scipy {scipy}"
                );
                assert!(e2 <= 1e-9, "nbinom c={c} r={r} p={p}: {got} vs mpmath {mp}");
            }
        }
        assert!(smallest < 1e-12, "grid must reach tails below 1e-12");
        eprintln!("nbinom tail worst rel err: scipy {worst_scipy:e}, mpmath {worst_mp:e}");
    }

    #[test]
    fn incomplete_functions_match_scipy() {
        // Reference: scipy.special.gammainc / gammaincc / betainc / betaincc.
        let data = reference();
        let mut worst = 0.0f64;
        for row in data["gamma_inc"].as_array().unwrap() {
            let a = row["a"].as_f64().unwrap();
            let x = row["x"].as_f64().unwrap();
            let p = row["p"].as_f64().unwrap();
            let q = row["q"].as_f64().unwrap();
            for (got, want) in [(gamma_p(a, x), p), (gamma_q(a, x), q)] {
                if want >= 1e-300 {
                    let e = rel_err(got, want);
                    worst = worst.max(e);
                    assert!(e <= 1e-9, "gamma a={a} x={x}: {got} vs {want}");
                }
            }
        }
        for row in data["beta_inc"].as_array().unwrap() {
            let a = row["a"].as_f64().unwrap();
            let b = row["b"].as_f64().unwrap();
            let x = row["x"].as_f64().unwrap();
            let i = row["i"].as_f64().unwrap();
            let j = row["ic"].as_f64().unwrap();
            let (gi, gj) = beta_inc_pair(a, b, x, 1.0 - x);
            for (got, want) in [(gi, i), (gj, j)] {
                if want >= 1e-300 {
                    let e = rel_err(got, want);
                    worst = worst.max(e);
                    assert!(e <= 1e-9, "beta a={a} b={b} x={x}: {got} vs {want}");
                }
            }
        }
        eprintln!("incomplete gamma/beta worst rel err vs scipy: {worst:e}");
    }

    #[test]
    fn critical_counts_match_scipy() {
        // Reference: smallest c with scipy sf(c - 1) < alpha, by a scan in
        // gen_activity.py.
        let data = reference();
        let mut n = 0;
        for row in data["critical_poisson"].as_array().unwrap() {
            let mean = row["mean"].as_f64().unwrap();
            let alpha = row["alpha"].as_f64().unwrap();
            let want = row["c"].as_u64().unwrap();
            assert_eq!(
                poisson_critical_count(mean, alpha),
                Some(want),
                "mean={mean} alpha={alpha}"
            );
            n += 1;
        }
        for row in data["critical_nbinom"].as_array().unwrap() {
            let r = row["r"].as_f64().unwrap();
            let p = row["p"].as_f64().unwrap();
            let alpha = row["alpha"].as_f64().unwrap();
            let want = row["c"].as_u64().unwrap();
            assert_eq!(
                nbinom_critical_count(r, p, alpha),
                Some(want),
                "r={r} p={p} alpha={alpha}"
            );
            n += 1;
        }
        assert!(n > 30);
    }

    #[test]
    fn geometric_case_is_exact() {
        // Worked example from the definition (METHODS 3): a = b = 1, e = 1
        // gives NB(1, 1/2), a geometric law with P(Y >= k) = 0.5^k exactly.
        for k in 0..=200u64 {
            let want = 0.5f64.powi(k as i32);
            let got = nbinom_upper_tail(k, 1.0, 0.5);
            // Rounding in ln Γ grows with k: about 1e-13 at k = 100.
            assert!(rel_err(got, want) <= 1e-12, "k={k}: {got} vs {want}");
        }
    }

    #[test]
    fn invalid_arguments_give_nan_or_none() {
        assert!(ln_gamma(0.0).is_nan());
        assert!(ln_gamma(-1.5).is_nan());
        assert!(poisson_upper_tail(3, -1.0).is_nan());
        assert!(nbinom_upper_tail(3, 0.0, 0.5).is_nan());
        assert!(nbinom_upper_tail(3, 1.0, 1.5).is_nan());
        assert_eq!(poisson_critical_count(2.0, 0.0), None);
        assert_eq!(nbinom_critical_count(2.0, 0.0, 0.01), None);
        // Definition: a Poisson with mean 0 never counts anything.
        assert_eq!(poisson_upper_tail(1, 0.0), 0.0);
        assert_eq!(poisson_upper_tail(0, 0.0), 1.0);
    }

    proptest! {
        #[test]
        fn tails_are_probabilities_and_fall_with_c(
            c in 0u64..400, r in 0.05f64..800.0, p in 0.001f64..0.999, mean in 0.0f64..500.0
        ) {
            // Definition: a tail probability lies in [0, 1] and P(Y >= c + 1) <= P(Y >= c).
            let t0 = nbinom_upper_tail(c, r, p);
            let t1 = nbinom_upper_tail(c + 1, r, p);
            prop_assert!((0.0..=1.0).contains(&t0) && (0.0..=1.0).contains(&t1));
            prop_assert!(t1 <= t0 * (1.0 + 1e-12));
            let u0 = poisson_upper_tail(c, mean);
            let u1 = poisson_upper_tail(c + 1, mean);
            prop_assert!((0.0..=1.0).contains(&u0) && (0.0..=1.0).contains(&u1));
            prop_assert!(u1 <= u0 * (1.0 + 1e-12));
        }
    }
}
