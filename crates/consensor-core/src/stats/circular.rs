//! Statistics of directions in degrees (wind direction), where 359° and 1° are 2° apart.
//!
//! The circular median is the direction minimising the sum of angular (arc) distances to the data
//! (Mardia & Jupp, *Directional Statistics*, §2.2.2; from memory). Σ d(θ, x_i) is piecewise linear in
//! θ with kinks at the data points (where it is locally convex) and at their antipodes (locally
//! concave), so a minimum is attained at a data point: we evaluate the sum at every data point,
//! O(n²) for the handful of values an interval holds.
//!
//! Once the circular median c is known, every value is "unwrapped" to c + signed_difference(x, c), a
//! number within 180° of c. For any v the linear sum Σ|u_i − v| is at least the circular sum
//! Σ d(x_i, v), with equality at v = c; since c minimises the circular sum, it also minimises the
//! linear sum over the unwrapped values. The linear statistics (median range, MAD, Huber, confidence
//! interval) are therefore computed on unwrapped values and the results wrapped back into [0, 360).

/// The signed angular difference `a − b` in degrees, in (−180, 180].
pub fn signed_difference(a: f64, b: f64) -> f64 {
    let difference = (a - b).rem_euclid(360.0);
    if difference > 180.0 {
        difference - 360.0
    } else {
        difference
    }
}

/// The arc distance between two directions, in [0, 180].
pub fn angular_distance(a: f64, b: f64) -> f64 {
    signed_difference(a, b).abs()
}

/// A direction normalised into [0, 360).
pub fn wrap_degrees(direction: f64) -> f64 {
    let wrapped = direction.rem_euclid(360.0);
    // rem_euclid can return 360.0 for tiny negative inputs through rounding.
    if wrapped >= 360.0 {
        0.0
    } else {
        wrapped
    }
}

/// The circular median of `directions`: the data point minimising Σ d(θ, x_i), ties broken towards the
/// first such point in input order. `None` for no values.
pub fn circular_median(directions: &[f64]) -> Option<f64> {
    let mut best: Option<(f64, f64)> = None;
    for &candidate in directions {
        let total = super::location::compensated_sum(
            directions.iter().map(|&x| angular_distance(candidate, x)),
        );
        if best.is_none_or(|(_, best_total)| total < best_total) {
            best = Some((wrap_degrees(candidate), total));
        }
    }
    best.map(|(direction, _)| direction)
}

/// Writes `centre + signed_difference(x, centre)` for every x into `out` (cleared first).
pub fn unwrap_around(directions: &[f64], centre: f64, out: &mut Vec<f64>) {
    out.clear();
    out.extend(
        directions
            .iter()
            .map(|&x| centre + signed_difference(x, centre)),
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn differences_wrap_around_north() {
        // Arithmetic of the circle (common practice): 359° → 1° is +2°, 1° → 359° is −2°.
        assert_eq!(signed_difference(1.0, 359.0), 2.0);
        assert_eq!(signed_difference(359.0, 1.0), -2.0);
        assert_eq!(signed_difference(180.0, 0.0), 180.0);
        assert_eq!(signed_difference(0.0, 180.0), 180.0);
        assert_eq!(angular_distance(10.0, 350.0), 20.0);
        assert_eq!(wrap_degrees(-10.0), 350.0);
        assert_eq!(wrap_degrees(360.0), 0.0);
    }

    #[test]
    fn circular_median_across_north() {
        // Directions 350, 355, 0, 5, 10: the arithmetic median is 10 (sorted: 0,5,10,350,355), the
        // circular median is 0 (sum of arc distances 30, against 40 at 355 or 5).
        let data = [350.0, 355.0, 0.0, 5.0, 10.0];
        assert_eq!(circular_median(&data), Some(0.0));
        let mut unwrapped = Vec::new();
        unwrap_around(&data, 0.0, &mut unwrapped);
        assert_eq!(unwrapped, vec![-10.0, -5.0, 0.0, 5.0, 10.0]);
        assert_eq!(circular_median(&[]), None);
    }

    #[test]
    fn circular_median_minimises_the_arc_sum_over_a_fine_grid() {
        // Brute force over a 0.1° grid: nothing beats the circular median (definition, Mardia & Jupp).
        let data = [10.0, 20.0, 200.0, 350.0, 355.0, 15.0, 190.0];
        let median = circular_median(&data).unwrap();
        let cost = |theta: f64| {
            data.iter()
                .map(|&x| angular_distance(theta, x))
                .sum::<f64>()
        };
        let best = cost(median);
        for step in 0..3600 {
            let theta = step as f64 / 10.0;
            assert!(cost(theta) >= best - 1e-9, "θ = {theta}");
        }
    }
}
