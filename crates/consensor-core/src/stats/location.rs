//! Estimators of location other than the median: the compensated mean and Huber's M-estimate.

/// Huber's tuning constant k = 1.345, which gives 95 % asymptotic efficiency at the normal
/// distribution (R `marg::Huber` and statsmodels `HuberT(t=1.345)` documentation, REFERENCE.md §10).
pub const HUBER_K: f64 = 1.345;

/// Convergence tolerance of the Huber iteration, relative to the scale: iteration stops when the
/// location moves by at most `HUBER_TOLERANCE × scale`. Relative to the scale so that the estimate is
/// shift- and scale-equivariant to rounding (a fixed absolute tolerance would not be).
pub const HUBER_TOLERANCE: f64 = 1e-9;

/// Upper bound on Huber iterations; the fixed-scale iteration converges linearly and, for the data
/// sizes here, in a few dozen steps (about 20 on the `chem` data).
pub const HUBER_MAX_ITERATIONS: usize = 500;

/// The sum of `terms` with Neumaier's compensated summation, which keeps the rounding error
/// independent of n (Neumaier 1974, an improvement of Kahan's algorithm).
pub fn compensated_sum(terms: impl IntoIterator<Item = f64>) -> f64 {
    let mut sum = 0.0_f64;
    let mut compensation = 0.0_f64;
    for term in terms {
        let next = sum + term;
        if sum.abs() >= term.abs() {
            compensation += (sum - next) + term;
        } else {
            compensation += (term - next) + sum;
        }
        sum = next;
    }
    sum + compensation
}

/// The arithmetic mean with compensated summation; `None` for no values.
pub fn mean(values: &[f64]) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    Some(compensated_sum(values.iter().copied()) / values.len() as f64)
}

/// Huber's M-estimate of location with the scale held fixed.
///
/// Definition: the μ solving Σ ψ_k((x_i − μ)/s) = 0 with ψ_k(u) = clip(u, −k, k), found by iteratively
/// reweighted least squares from the median: μ ← Σ w_i x_i / Σ w_i with w_i = 1 for |u_i| ≤ k and
/// k/|u_i| otherwise (statsmodels `HuberT.weights`). `start` is the median of the data; with `scale`
/// equal to 0 (or not finite and positive) the estimate is the median itself, since no reading can be
/// weighed against a spread of zero.
///
/// Returns `None` for no values.
pub fn huber_location(values: &[f64], start: f64, scale: f64, k: f64) -> Option<f64> {
    if values.is_empty() {
        return None;
    }
    if !(scale > 0.0 && scale.is_finite()) {
        return Some(start);
    }
    let mut location = start;
    for _ in 0..HUBER_MAX_ITERATIONS {
        let mut weighted_sum = 0.0;
        let mut weighted_sum_compensation = 0.0;
        let mut weight_total = 0.0;
        for &x in values {
            let u = (x - location) / scale;
            let weight = if u.abs() <= k { 1.0 } else { k / u.abs() };
            // Compensated accumulation of Σ w·x, inline to stay allocation-free.
            let term = weight * x;
            let next = weighted_sum + term;
            if f64::abs(weighted_sum) >= term.abs() {
                weighted_sum_compensation += (weighted_sum - next) + term;
            } else {
                weighted_sum_compensation += (term - next) + weighted_sum;
            }
            weighted_sum = next;
            weight_total += weight;
        }
        let next_location = (weighted_sum + weighted_sum_compensation) / weight_total;
        let moved = (next_location - location).abs();
        location = next_location;
        if moved <= HUBER_TOLERANCE * scale {
            break;
        }
    }
    Some(location)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::tests_data::CHEM;

    #[test]
    fn compensated_sum_recovers_what_naive_summation_loses() {
        // 1 + 1e-16 × 10 + (−1): naive left-to-right summation returns 0, the exact answer is 1e-15
        // (each 1e-16 is below half an ulp of 1). Exact arithmetic, common practice for testing Kahan
        // and Neumaier summation.
        let mut terms = vec![1.0];
        terms.extend(std::iter::repeat_n(1e-16, 10));
        terms.push(-1.0);
        assert_eq!(terms.iter().sum::<f64>(), 0.0);
        assert!((compensated_sum(terms.iter().copied()) - 1e-15).abs() < 1e-30);
    }

    #[test]
    fn mean_of_chem() {
        // numpy 2.4 `np.mean(chem)` = 4.280416666666667 (REFERENCE.md §10 gives 4.28042).
        let got = mean(&CHEM).unwrap();
        assert!((got - 4.280416666666667).abs() < 1e-12, "{got}");
        assert_eq!(mean(&[]), None);
    }

    #[test]
    fn huber_on_chem_matches_the_fixed_scale_irls_references() {
        // Scale fixed at MADn = 0.5263237876 (statsmodels 0.15 `robust.scale.mad(chem)`).
        let scale = 1.482602218505602 * 0.355;
        let start = 3.385;
        // k = 1.345: 3.2162520, REFERENCE.md §10 [COMPUTED], fixed-scale IRLS with statsmodels' HuberT
        // weights (`sm.RLM(chem, ones, M=HuberT()).fit(update_scale=False, scale_est=...)`-style loop).
        let got = huber_location(&CHEM, start, scale, HUBER_K).unwrap();
        assert!((got - 3.2162520).abs() < 5e-7, "{got}");
        // k = 1.5: 3.2067238; R `MASS::huber(chem)` gives mu = 3.206724 (from memory, REFERENCE.md §10).
        let got = huber_location(&CHEM, start, scale, 1.5).unwrap();
        assert!((got - 3.2067238).abs() < 5e-7, "{got}");
    }

    #[test]
    fn huber_with_zero_scale_is_the_start() {
        assert_eq!(
            huber_location(&[1.0, 1.0, 1.0, 9.0], 1.0, 0.0, HUBER_K),
            Some(1.0)
        );
        assert_eq!(huber_location(&[], 1.0, 1.0, HUBER_K), None);
    }
}
