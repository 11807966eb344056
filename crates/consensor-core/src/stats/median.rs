//! The median as the whole set of minimisers of the total absolute error, found by selection.
//!
//! For data x_1…x_n the function v ↦ Σ|x_i − v| is convex and piecewise linear. For odd n its only
//! minimiser is the middle order statistic; for even n every v between the two middle order statistics
//! x_(n/2) and x_(n/2+1) attains the same minimum (Laplace; any statistics text on the L1 location
//! problem). We therefore report both ends, `low` and `high`, and their midpoint, which is the
//! conventional "median" of numpy, scipy and statsmodels.
//!
//! Selection (`select_nth_unstable_by`, introselect, O(n) expected) replaces sorting (O(n log n)) because
//! only one or two order statistics are needed.

/// The set of minimisers of Σ|x_i − v|: the closed interval `[low, high]`, and its midpoint.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct MedianRange {
    /// The lower median: the ⌈n/2⌉-th order statistic (1-based).
    pub low: f64,
    /// The upper median: the (⌊n/2⌋ + 1)-th order statistic (1-based); equal to `low` for odd n.
    pub high: f64,
    /// `(low + high) / 2`, the conventional median.
    pub mid: f64,
}

/// The median range of `values`, reordering the slice in place (no allocation).
///
/// Returns `None` for an empty slice. Values must be finite; NaN is refused at the edges of the
/// program, and `f64::total_cmp` keeps the selection well defined even if one slipped through.
pub fn median_range_in_place(values: &mut [f64]) -> Option<MedianRange> {
    let n = values.len();
    if n == 0 {
        return None;
    }
    let upper_index = n / 2;
    let (lower_part, upper, _) = values.select_nth_unstable_by(upper_index, f64::total_cmp);
    let high = *upper;
    let low = if n % 2 == 1 {
        high
    } else {
        // After selection every element left of `upper_index` is ≤ it, so the lower middle order
        // statistic is the largest of them: one linear pass, no second selection.
        lower_part
            .iter()
            .copied()
            .max_by(f64::total_cmp)
            .expect("even n ≥ 2 leaves a non-empty lower part")
    };
    Some(MedianRange {
        low,
        high,
        mid: midpoint(low, high),
    })
}

/// The conventional median (midpoint of the two middle values for even n), reordering in place.
pub fn median_in_place(values: &mut [f64]) -> Option<f64> {
    median_range_in_place(values).map(|range| range.mid)
}

/// The median range of `values`, copying them into `scratch` (which is cleared and reused, so a caller
/// that keeps the buffer allocates nothing once it has grown).
pub fn median_range_with(values: &[f64], scratch: &mut Vec<f64>) -> Option<MedianRange> {
    scratch.clear();
    scratch.extend_from_slice(values);
    median_range_in_place(scratch)
}

/// The median range of `values`, leaving them untouched (allocates one copy).
pub fn median_range(values: &[f64]) -> Option<MedianRange> {
    median_range_with(values, &mut Vec::with_capacity(values.len()))
}

/// The conventional median of `values`, leaving them untouched (allocates one copy).
pub fn median(values: &[f64]) -> Option<f64> {
    median_range(values).map(|range| range.mid)
}

/// The median found by fully sorting a copy: the O(n log n) baseline the benchmark compares
/// selection against, and an independent oracle for the tests.
pub fn median_by_sorting(values: &[f64]) -> Option<MedianRange> {
    if values.is_empty() {
        return None;
    }
    let mut sorted = values.to_vec();
    sorted.sort_unstable_by(f64::total_cmp);
    let n = sorted.len();
    let low = sorted[(n - 1) / 2];
    let high = sorted[n / 2];
    Some(MedianRange {
        low,
        high,
        mid: midpoint(low, high),
    })
}

/// The sum of absolute deviations Σ|x_i − v|, the objective the median minimises.
pub fn total_absolute_error(values: &[f64], v: f64) -> f64 {
    super::location::compensated_sum(values.iter().map(|x| (x - v).abs()))
}

/// `(a + b) / 2` computed without overflow: for operands of one sign their difference cannot overflow,
/// and for operands of opposite signs their sum cannot.
pub(crate) fn midpoint(a: f64, b: f64) -> f64 {
    if a.is_sign_negative() == b.is_sign_negative() {
        a + (b - a) / 2.0
    } else {
        (a + b) / 2.0
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Expected values: numpy 2.4 `np.median` for `mid`; `np.sort(x)[(n-1)//2]` and `np.sort(x)[n//2]`
    // for the ends. Computed once in Python and copied here.
    fn check(input: &[f64], low: f64, high: f64, mid: f64) {
        let got = median_range(input).expect("non-empty input");
        assert_eq!(
            (got.low, got.high, got.mid),
            (low, high, mid),
            "input {input:?}"
        );
        assert_eq!(median_by_sorting(input), Some(got));
    }

    #[test]
    fn median_boundaries() {
        check(&[5.0], 5.0, 5.0, 5.0);
        check(&[2.0, 1.0], 1.0, 2.0, 1.5);
        check(&[3.0, 1.0, 2.0], 2.0, 2.0, 2.0);
        check(&[4.0, 4.0, 4.0, 4.0], 4.0, 4.0, 4.0);
        // Leys et al. (2013) worked example: median 7 (the two middle values are 6 and 8).
        check(
            &[1.0, 3.0, 3.0, 6.0, 8.0, 10.0, 10.0, 1000.0],
            6.0,
            8.0,
            7.0,
        );
        // MASS `chem` data (Venables & Ripley): median 3.385, REFERENCE.md §10 [COMPUTED] with numpy.
        check(&crate::stats::tests_data::CHEM, 3.37, 3.4, 3.385);
        check(&[-0.0, 0.0], -0.0, 0.0, 0.0);
    }

    #[test]
    fn empty_input_has_no_median() {
        assert_eq!(median_range(&[]), None);
        assert_eq!(median_by_sorting(&[]), None);
    }

    #[test]
    fn midpoint_does_not_overflow() {
        assert_eq!(midpoint(f64::MAX, f64::MAX), f64::MAX);
        assert_eq!(midpoint(-f64::MAX, f64::MAX), 0.0);
    }
}
