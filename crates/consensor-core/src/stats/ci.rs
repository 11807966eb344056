//! The distribution-free confidence interval for the median from order statistics.
//!
//! For a continuous distribution with median θ and order statistics X(1) ≤ … ≤ X(n),
//! P(X(r) ≤ θ ≤ X(n−r+1)) = 1 − 2·P(B ≤ r − 1) with B ~ Binomial(n, 1/2) (Conover, *Practical
//! Nonparametric Statistics*, the sign-test interval; REFERENCE.md §8). The interval with coverage at
//! least 1 − α is the one with the largest such r. No two-sided 95 % interval exists for n ≤ 5: the
//! widest, [X(1), X(n)], covers only 1 − 2/2ⁿ (93.75 % at n = 5).

use statrs::distribution::{Binomial, DiscreteCDF};

use super::median::median_range_in_place;

/// Which order statistics bound the interval, and its exact coverage.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct OrderStatisticInterval {
    /// r: the interval is [X(r), X(n − r + 1)] with 1-based order statistics.
    pub rank: usize,
    /// The coverage 1 − 2·P(B ≤ r − 1), at least the confidence asked for.
    pub coverage: f64,
}

/// The exact coverage of [X(r), X(n−r+1)] for n values (1 ≤ r ≤ (n+1)/2).
pub fn order_statistic_coverage(n: usize, rank: usize) -> f64 {
    assert!(
        rank >= 1 && 2 * rank <= n + 1,
        "rank {rank} out of range for n = {n}"
    );
    let binomial = Binomial::new(0.5, n as u64).expect("p = 1/2 is a valid probability");
    let tail = binomial.cdf(rank as u64 - 1);
    1.0 - 2.0 * tail
}

/// The largest r whose interval has coverage ≥ `confidence`; `None` when even r = 1 falls short
/// (too few values).
pub fn median_ci_rank(n: usize, confidence: f64) -> Option<OrderStatisticInterval> {
    if n == 0 || order_statistic_coverage(n, 1) < confidence {
        return None;
    }
    // Coverage falls as r grows, so binary search the last r that still reaches `confidence`.
    let (mut good, mut bad) = (1usize, n.div_ceil(2) + 1);
    while bad - good > 1 {
        let middle = good + (bad - good) / 2;
        if order_statistic_coverage(n, middle) >= confidence {
            good = middle;
        } else {
            bad = middle;
        }
    }
    Some(OrderStatisticInterval {
        rank: good,
        coverage: order_statistic_coverage(n, good),
    })
}

/// The confidence interval `(X(r), X(n−r+1))` for the median of `values`, reordering them in place;
/// `None` when n is too small for the confidence asked.
pub fn median_ci_in_place(values: &mut [f64], confidence: f64) -> Option<(f64, f64)> {
    let n = values.len();
    let interval = median_ci_rank(n, confidence)?;
    let lower_index = interval.rank - 1;
    let upper_index = n - interval.rank;
    let (_, upper, _) = values.select_nth_unstable_by(upper_index, f64::total_cmp);
    let upper = *upper;
    let (_, lower, _) = values[..=upper_index].select_nth_unstable_by(lower_index, f64::total_cmp);
    Some((*lower, upper))
}

/// As [`median_ci_in_place`], but also returns nothing for an empty slice and leaves the input alone.
pub fn median_ci(values: &[f64], confidence: f64) -> Option<(f64, f64)> {
    median_ci_in_place(&mut values.to_vec(), confidence)
}

/// The confidence interval and median range in one pass over a reused buffer.
pub fn median_and_ci_with(
    values: &[f64],
    confidence: f64,
    scratch: &mut Vec<f64>,
) -> Option<(super::median::MedianRange, Option<(f64, f64)>)> {
    scratch.clear();
    scratch.extend_from_slice(values);
    let range = median_range_in_place(scratch)?;
    let ci = median_ci_in_place(scratch, confidence);
    Some((range, ci))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn coverage_matches_the_published_table() {
        // "Table A.7: Confidence Intervals for the Population Median", p. 656 of a textbook (REFERENCE.md
        // §8, [READ]); the exact figures are scipy 1.17 `1 - 2*binom.cdf(r-1, n, 0.5)` [COMPUTED].
        let table = [
            (8, 2, 0.930),
            (9, 2, 0.961),
            (10, 2, 0.979),
            (10, 3, 0.891),
            (12, 3, 0.961),
            (15, 4, 0.965),
            (20, 6, 0.959),
            (20, 5, 0.988),
        ];
        for (n, rank, published) in table {
            let got = order_statistic_coverage(n, rank);
            assert!((got - published).abs() < 5e-4, "n={n} r={rank}: {got}");
        }
        assert!((order_statistic_coverage(10, 2) - 0.978516).abs() < 1e-6);
        assert!((order_statistic_coverage(10, 3) - 0.890625).abs() < 1e-6);
        assert!((order_statistic_coverage(20, 6) - 0.958611).abs() < 1e-6);
    }

    #[test]
    fn largest_rank_with_95_percent_coverage() {
        // REFERENCE.md §8 [COMPUTED] with scipy 1.17 `binom.cdf`: n: r (coverage).
        let expected = [
            (6, 1, 0.96875),
            (9, 2, 0.9609),
            (12, 3, 0.9614),
            (15, 4, 0.9648),
            (20, 6, 0.9586),
            (25, 8, 0.9567),
            (30, 10, 0.9572),
            (50, 18, 0.9672),
            (100, 40, 0.9648),
        ];
        for (n, rank, coverage) in expected {
            let got = median_ci_rank(n, 0.95).unwrap();
            assert_eq!(got.rank, rank, "n = {n}");
            assert!(
                (got.coverage - coverage).abs() < 5e-5,
                "n = {n}: {}",
                got.coverage
            );
        }
    }

    #[test]
    fn too_few_values_have_no_95_percent_interval() {
        // The widest interval for n = 5 covers 1 − 2/32 = 93.75 % (REFERENCE.md §8).
        assert!((order_statistic_coverage(5, 1) - 0.9375).abs() < 1e-12);
        for n in 0..=5 {
            assert_eq!(median_ci_rank(n, 0.95), None, "n = {n}");
            assert_eq!(median_ci(&vec![1.0; n], 0.95), None);
        }
    }

    #[test]
    fn interval_picks_the_order_statistics() {
        // n = 10 → r = 2 (97.9 %, the table above): [X(2), X(9)] of 1..=10 in scrambled order.
        let values = [7.0, 1.0, 10.0, 3.0, 5.0, 2.0, 9.0, 4.0, 8.0, 6.0];
        assert_eq!(median_ci(&values, 0.95), Some((2.0, 9.0)));
        let (range, ci) = median_and_ci_with(&values, 0.95, &mut Vec::new()).unwrap();
        assert_eq!((range.low, range.high, ci), (5.0, 6.0, Some((2.0, 9.0))));
    }
}
