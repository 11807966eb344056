//! Robust straight lines: the Theil–Sen slope with Sen's confidence interval, and the exact
//! least-absolute-deviations (LAD) line.

use statrs::distribution::{ContinuousCDF, Normal};

use super::median::median_in_place;
use super::weighted::lower_weighted_median;

/// A straight line y = intercept + slope·x.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Line {
    pub intercept: f64,
    pub slope: f64,
}

impl Line {
    /// The line's value at `x`.
    pub fn at(&self, x: f64) -> f64 {
        self.intercept + self.slope * x
    }

    /// Σ|y_i − line(x_i)|, the LAD objective.
    pub fn total_absolute_residual(&self, x: &[f64], y: &[f64]) -> f64 {
        super::location::compensated_sum(x.iter().zip(y).map(|(&xi, &yi)| (yi - self.at(xi)).abs()))
    }
}

/// The Theil–Sen estimate with Sen's confidence interval for the slope.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct TheilSen {
    pub line: Line,
    /// Lower and upper confidence limits of the slope.
    pub slope_low: f64,
    pub slope_high: f64,
}

/// Errors from the line fits.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum LineFitError {
    #[error("x and y have different lengths ({x} and {y})")]
    LengthMismatch { x: usize, y: usize },
    #[error("a line needs at least two points with different x")]
    TooFewDistinctX,
    #[error("confidence {0} must lie strictly between 0 and 1")]
    BadConfidence(f64),
}

/// The Theil–Sen line (Theil 1950; Sen 1968): the slope is the median of the slopes of all pairs with
/// x_j > x_i; the intercept is median(y) − slope·median(x) (scipy's default `method='separate'`).
///
/// The confidence interval is Sen (1968) eq. (2.6) as scipy 1.17 `theilslopes` implements it: with
/// N slopes sorted, σ² = [n(n−1)(2n+5) − Σ_ties t(t−1)(2t+5)]/18 over the ties in x and in y,
/// z = Φ⁻¹(1 − α/2), and the limits are the sorted slopes at 0-based indices
/// round((N − zσ)/2) − 1 and round((N + zσ)/2) (round half to even, as numpy), clamped to the range.
///
/// Memory is O(n²) (all pairwise slopes); callers with long series thin them first.
pub fn theil_sen(x: &[f64], y: &[f64], confidence: f64) -> Result<TheilSen, LineFitError> {
    check_lengths(x, y)?;
    if !(confidence > 0.0 && confidence < 1.0) {
        return Err(LineFitError::BadConfidence(confidence));
    }
    let n = x.len();
    let mut slopes = Vec::with_capacity(n * n.saturating_sub(1) / 2);
    for i in 0..n {
        for j in 0..n {
            let dx = x[j] - x[i];
            if dx > 0.0 {
                slopes.push((y[j] - y[i]) / dx);
            }
        }
    }
    if slopes.is_empty() {
        return Err(LineFitError::TooFewDistinctX);
    }
    slopes.sort_unstable_by(f64::total_cmp);
    let count = slopes.len();
    let slope = if count % 2 == 1 {
        slopes[count / 2]
    } else {
        super::median::midpoint(slopes[count / 2 - 1], slopes[count / 2])
    };
    let median_x = median_in_place(&mut x.to_vec()).expect("n ≥ 2");
    let median_y = median_in_place(&mut y.to_vec()).expect("n ≥ 2");
    let intercept = median_y - slope * median_x;

    let alpha = 1.0 - confidence;
    let z = Normal::standard().inverse_cdf(1.0 - alpha / 2.0);
    let nf = n as f64;
    let variance = (nf * (nf - 1.0) * (2.0 * nf + 5.0) - tie_term(x) - tie_term(y)) / 18.0;
    let sigma = variance.max(0.0).sqrt();
    let half_count = count as f64;
    let upper_index =
        (((half_count + z * sigma) / 2.0).round_ties_even() as i64).min(count as i64 - 1);
    let lower_index = ((((half_count - z * sigma) / 2.0).round_ties_even() as i64) - 1).max(0);
    Ok(TheilSen {
        line: Line { intercept, slope },
        slope_low: slopes[lower_index.clamp(0, count as i64 - 1) as usize],
        slope_high: slopes[upper_index.clamp(0, count as i64 - 1) as usize],
    })
}

/// Σ t(t−1)(2t+5) over groups of tied values (Sen 1968 eq. 2.6; Kendall's tie correction).
fn tie_term(values: &[f64]) -> f64 {
    let mut sorted = values.to_vec();
    sorted.sort_unstable_by(f64::total_cmp);
    let mut total = 0.0;
    let mut start = 0;
    while start < sorted.len() {
        let mut end = start + 1;
        while end < sorted.len() && sorted[end] == sorted[start] {
            end += 1;
        }
        let t = (end - start) as f64;
        if t > 1.0 {
            total += t * (t - 1.0) * (2.0 * t + 5.0);
        }
        start = end;
    }
    total
}

/// The exact least-absolute-deviations line: the (intercept, slope) minimising Σ|y_i − a − b·x_i|.
///
/// The objective is convex and piecewise linear in (a, b), with a kink along "the line passes through
/// point i" for every i, so an optimal line passes through (at least) two data points, and from any
/// such vertex the edges to follow are the rotations of the line about one of the points it passes
/// through. We descend along those edges (Wesolowsky 1981, direct descent): rotating about a point p,
/// the best line is a weighted median of the slopes from p to the other points, with weights
/// |x_i − x_p|. From the current line we try every point it passes through as the pivot and move while
/// the objective strictly falls. Trying all of them, not only the last two, matters when three or more
/// points are collinear on the line: there the objective is not separable in the two pivots and a
/// two-point descent can stall short of the optimum. As in the simplex method, a vertex that no edge
/// improves is a global optimum. The search is exact (no step size, no tolerance on coefficients);
/// LAD optima can be non-unique, and any optimal line may be returned.
pub fn least_absolute_deviations(x: &[f64], y: &[f64]) -> Result<Line, LineFitError> {
    check_lengths(x, y)?;
    let n = x.len();
    let first_x = x.first().copied().ok_or(LineFitError::TooFewDistinctX)?;
    if x.iter().all(|&xi| xi == first_x) {
        return Err(LineFitError::TooFewDistinctX);
    }
    // Start at the point whose x is the median: a central pivot shortens the descent.
    let median_x = median_in_place(&mut x.to_vec()).expect("n ≥ 1");
    let start = (0..n)
        .min_by(|&a, &b| (x[a] - median_x).abs().total_cmp(&(x[b] - median_x).abs()))
        .expect("n ≥ 1");
    let mut pairs: Vec<(f64, f64)> = Vec::with_capacity(n);
    let mut current = best_line_through(start, x, y, &mut pairs);
    let magnitude = y.iter().fold(1.0_f64, |m, v| m.max(v.abs()));
    // Each move strictly lowers the objective over the finitely many lines through two points, so the
    // loop ends; the bound only guards against rounding making two lines alternate.
    for _ in 0..(4 * n + 16) {
        let on_line = |i: usize| (y[i] - current.0.at(x[i])).abs() <= 1e-9 * magnitude;
        let mut improved: Option<(Line, f64)> = None;
        for pivot in (0..n).filter(|&i| on_line(i)) {
            let candidate = best_line_through(pivot, x, y, &mut pairs);
            let bar = improved.map_or(current.1, |(_, objective)| objective);
            if candidate.1 < bar - 1e-12 * (1.0 + bar) {
                improved = Some(candidate);
            }
        }
        match improved {
            Some(better) => current = better,
            None => break,
        }
    }
    Ok(current.0)
}

/// The best line through point `pivot` and its objective: the slope is the lower weighted median of
/// the slopes to the other points, weighted by |x_i − x_pivot|.
fn best_line_through(
    pivot: usize,
    x: &[f64],
    y: &[f64],
    pairs: &mut Vec<(f64, f64)>,
) -> (Line, f64) {
    pairs.clear();
    for i in 0..x.len() {
        let dx = x[i] - x[pivot];
        if dx != 0.0 {
            pairs.push(((y[i] - y[pivot]) / dx, dx.abs()));
        }
    }
    let slope = lower_weighted_median(pairs).expect("some x differs from the pivot's");
    let line = Line {
        intercept: y[pivot] - slope * x[pivot],
        slope,
    };
    (line, line.total_absolute_residual(x, y))
}

fn check_lengths(x: &[f64], y: &[f64]) -> Result<(), LineFitError> {
    if x.len() != y.len() {
        return Err(LineFitError::LengthMismatch {
            x: x.len(),
            y: y.len(),
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(got: f64, expected: f64, tolerance: f64) {
        assert!(
            (got - expected).abs() <= tolerance,
            "got {got}, expected {expected}"
        );
    }

    #[test]
    fn theil_sen_small_examples() {
        // REFERENCE.md §9 [COMPUTED] with scipy 1.17.1 `theilslopes(y, x, alpha=0.95)`:
        // x = [1..5], y = [1,2,3,4,20]: slope 1.0, intercept 0.0, CI [1.0, 16.0].
        let fit = theil_sen(
            &[1.0, 2.0, 3.0, 4.0, 5.0],
            &[1.0, 2.0, 3.0, 4.0, 20.0],
            0.95,
        )
        .unwrap();
        assert_eq!((fit.line.slope, fit.line.intercept), (1.0, 0.0));
        assert_eq!((fit.slope_low, fit.slope_high), (1.0, 16.0));
        // x = 0..9, y = [0,1.1,1.9,3.2,3.9,5.1,6.0,6.8,30.0,9.1]: slope 1.0, intercept 0.0,
        // CI [0.95, 1.10].
        let x: Vec<f64> = (0..10).map(f64::from).collect();
        let y = [0.0, 1.1, 1.9, 3.2, 3.9, 5.1, 6.0, 6.8, 30.0, 9.1];
        let fit = theil_sen(&x, &y, 0.95).unwrap();
        close(fit.line.slope, 1.0, 1e-12);
        close(fit.line.intercept, 0.0, 1e-12);
        close(fit.slope_low, 0.95, 1e-12);
        close(fit.slope_high, 1.10, 1e-12);
    }

    #[test]
    fn lad_small_examples() {
        // REFERENCE.md §9 [COMPUTED], exact LAD by linear programme: y = x with Σ|r| = 15.
        let x = [1.0, 2.0, 3.0, 4.0, 5.0];
        let y = [1.0, 2.0, 3.0, 4.0, 20.0];
        let line = least_absolute_deviations(&x, &y).unwrap();
        close(line.total_absolute_residual(&x, &y), 15.0, 1e-12);
        // x = 0..9 with one wild point: slope 1.011111, intercept 0, Σ|r| = 22.8222.
        let x: Vec<f64> = (0..10).map(f64::from).collect();
        let y = [0.0, 1.1, 1.9, 3.2, 3.9, 5.1, 6.0, 6.8, 30.0, 9.1];
        let line = least_absolute_deviations(&x, &y).unwrap();
        close(line.total_absolute_residual(&x, &y), 22.8222, 5e-5);
        close(line.slope, 1.011111, 5e-7);
        close(line.intercept, 0.0, 1e-9);
    }

    #[test]
    fn degenerate_inputs_are_errors() {
        assert_eq!(
            theil_sen(&[1.0, 1.0], &[1.0, 2.0], 0.95),
            Err(LineFitError::TooFewDistinctX)
        );
        assert_eq!(
            least_absolute_deviations(&[], &[]),
            Err(LineFitError::TooFewDistinctX)
        );
        assert_eq!(
            least_absolute_deviations(&[1.0], &[1.0, 2.0]),
            Err(LineFitError::LengthMismatch { x: 1, y: 2 })
        );
        assert_eq!(
            theil_sen(&[1.0, 2.0], &[1.0, 2.0], 1.0),
            Err(LineFitError::BadConfidence(1.0))
        );
    }
}
