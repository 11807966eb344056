//! The weighted median.
//!
//! The weighted median minimises Σ w_i |x_i − m| (w_i ≥ 0). It is a value x_k with
//! Σ_{x_i < x_k} w_i ≤ W/2 and Σ_{x_i > x_k} w_i ≤ W/2 (W = Σ w_i). When the cumulative weight reaches
//! exactly W/2 at some x_k, every m in [x_k, x_next] minimises it; we return the **lower weighted
//! median** x_k, the convention attributed to Edgeworth (1888) (REFERENCE.md §7).

/// The lower weighted median of `(value, weight)` pairs: the smallest value whose cumulative weight
/// (in ascending order of value) reaches half the total. Pairs with zero weight are ignored. `None`
/// when no pair has positive weight. Reorders `pairs`.
///
/// Panics on a negative or non-finite weight: weights are computed by the program, never read from
/// input, so such a weight is a programming error.
pub fn lower_weighted_median(pairs: &mut [(f64, f64)]) -> Option<f64> {
    let mut total = 0.0;
    for &(_, weight) in pairs.iter() {
        assert!(
            weight >= 0.0 && weight.is_finite(),
            "weight {weight} must be finite and non-negative"
        );
        total += weight;
    }
    if total <= 0.0 {
        return None;
    }
    pairs.sort_unstable_by(|a, b| a.0.total_cmp(&b.0));
    let half = total / 2.0;
    let mut cumulative = 0.0;
    for &(value, weight) in pairs.iter() {
        if weight == 0.0 {
            continue;
        }
        cumulative += weight;
        if cumulative >= half {
            return Some(value);
        }
    }
    // Rounding can leave the running sum a hair below `half` at the end; the last weighted value is
    // then the answer.
    pairs
        .iter()
        .rev()
        .find(|(_, weight)| *weight > 0.0)
        .map(|(value, _)| *value)
}

/// The weighted total absolute error Σ w_i |x_i − m|.
pub fn weighted_absolute_error(pairs: &[(f64, f64)], m: f64) -> f64 {
    super::location::compensated_sum(pairs.iter().map(|(x, w)| w * (x - m).abs()))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn encyclopaedia_example() {
        // {1,2,3,4,5} with weights {0.15,0.1,0.2,0.3,0.25}: ordinary median 3, weighted median 4
        // (REFERENCE.md §7, [SECONDARY] encyclopaedia example); brute-force argmin of Σw|v−m| over the
        // data points = 4.0 with minimum 1.1 [COMPUTED, numpy].
        let mut pairs = [(1.0, 0.15), (2.0, 0.1), (3.0, 0.2), (4.0, 0.3), (5.0, 0.25)];
        assert_eq!(lower_weighted_median(&mut pairs), Some(4.0));
        assert!((weighted_absolute_error(&pairs, 4.0) - 1.1).abs() < 1e-12);
    }

    #[test]
    fn equal_weights_give_the_lower_median() {
        // With equal weights the lower weighted median is the lower ordinary median (common practice).
        let mut pairs = [(4.0, 1.0), (1.0, 1.0), (3.0, 1.0), (2.0, 1.0)];
        assert_eq!(lower_weighted_median(&mut pairs), Some(2.0));
        let mut odd = [(4.0, 2.0), (1.0, 2.0), (3.0, 2.0)];
        assert_eq!(lower_weighted_median(&mut odd), Some(3.0));
    }

    #[test]
    fn tie_rule_returns_the_lower_end_and_both_ends_minimise() {
        // Cumulative weight reaches exactly half at 2: every m in [2, 10] minimises; we return 2.
        let mut pairs = [(10.0, 1.0), (2.0, 1.0)];
        assert_eq!(lower_weighted_median(&mut pairs), Some(2.0));
        let at_low = weighted_absolute_error(&pairs, 2.0);
        assert_eq!(at_low, weighted_absolute_error(&pairs, 10.0));
        assert_eq!(at_low, weighted_absolute_error(&pairs, 6.0));
    }

    #[test]
    fn declustering_example() {
        // REFERENCE.md §7 [COMPUTED, constructed]: cell weights 1/9 ×3 (10, 11, 12) and 1/3 ×2 (20, 30):
        // weighted median 20.
        let third = 1.0 / 3.0;
        let ninth = 1.0 / 9.0;
        let mut pairs = [
            (10.0, ninth),
            (11.0, ninth),
            (12.0, ninth),
            (20.0, third),
            (30.0, third),
        ];
        assert_eq!(lower_weighted_median(&mut pairs), Some(20.0));
    }

    #[test]
    fn no_weight_no_median() {
        assert_eq!(lower_weighted_median(&mut []), None);
        assert_eq!(lower_weighted_median(&mut [(1.0, 0.0)]), None);
        let mut with_zero = [(1.0, 0.0), (5.0, 1.0), (9.0, 1.0)];
        assert_eq!(lower_weighted_median(&mut with_zero), Some(5.0));
    }
}
