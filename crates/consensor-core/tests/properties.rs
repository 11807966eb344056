//! Property tests of the estimators: the defining optimality of the median and the mean, permutation
//! invariance, equivariance, and finite scores. These are mathematical definitions (common practice;
//! e.g. any text on L1 and L2 location estimation), checked against brute force.

use consensor_core::stats::{
    huber_location, least_absolute_deviations, mad, mean, median_by_sorting, median_range,
    modified_z_scores, Line, HUBER_K, MAD_TO_SD,
};
use proptest::prelude::*;

/// Readings-like values: moderate magnitudes, on a 0.01 grid so that ties (even-n plateaus, MAD = 0)
/// happen often.
fn values() -> impl Strategy<Value = Vec<f64>> {
    prop::collection::vec((-5000i32..5000).prop_map(|v| f64::from(v) / 100.0), 1..40)
}

fn total_absolute_error(data: &[f64], v: f64) -> f64 {
    data.iter().map(|x| (x - v).abs()).sum()
}

proptest! {
    #[test]
    fn median_range_is_exactly_the_set_of_minimisers(data in values()) {
        let range = median_range(&data).unwrap();
        prop_assert_eq!(Some(range), median_by_sorting(&data));
        let best = total_absolute_error(&data, range.mid);
        let tolerance = 1e-9 * (1.0 + best);
        // Brute scan over the data points (the objective is piecewise linear with kinks only there).
        for &v in &data {
            let cost = total_absolute_error(&data, v);
            prop_assert!(cost >= best - tolerance, "v={v} beats the median");
            let inside = v >= range.low && v <= range.high;
            prop_assert_eq!(inside, cost <= best + tolerance, "v={} inside={}", v, inside);
        }
        for v in [range.low, range.high, range.mid] {
            prop_assert!((total_absolute_error(&data, v) - best).abs() <= tolerance);
        }
        // Just outside the range the total error is strictly larger.
        let step = 0.005;
        prop_assert!(total_absolute_error(&data, range.low - step) > best + tolerance / 2.0);
        prop_assert!(total_absolute_error(&data, range.high + step) > best + tolerance / 2.0);
    }

    #[test]
    fn mean_minimises_the_squared_error(data in values(), offset in -10.0f64..10.0) {
        let m = mean(&data).unwrap();
        let squared = |v: f64| data.iter().map(|x| (x - v) * (x - v)).sum::<f64>();
        let best = squared(m);
        // Σ(x − (m + d))² = Σ(x − m)² + n d² exactly, so any shift costs n·d².
        let shifted = squared(m + offset / 100.0);
        prop_assert!(shifted >= best - 1e-7 * (1.0 + best));
    }

    #[test]
    fn estimators_are_permutation_invariant(data in values(), seed in any::<u64>()) {
        let mut shuffled = data.clone();
        // A deterministic Fisher–Yates shuffle from the seed.
        let mut state = seed | 1;
        for i in (1..shuffled.len()).rev() {
            state ^= state << 13; state ^= state >> 7; state ^= state << 17;
            shuffled.swap(i, (state % (i as u64 + 1)) as usize);
        }
        prop_assert_eq!(median_range(&data), median_range(&shuffled));
        prop_assert_eq!(mad(&data), mad(&shuffled));
        let a = mean(&data).unwrap();
        let b = mean(&shuffled).unwrap();
        prop_assert!((a - b).abs() <= 1e-9 * (1.0 + a.abs()));
    }

    #[test]
    fn median_mad_and_huber_are_shift_and_scale_equivariant(
        data in values(), shift in -1000.0f64..1000.0, scale in 0.1f64..100.0,
    ) {
        let moved: Vec<f64> = data.iter().map(|x| scale * x + shift).collect();
        let tolerance = |v: f64| 1e-9 * (1.0 + v.abs());
        let before = median_range(&data).unwrap();
        let after = median_range(&moved).unwrap();
        prop_assert!((after.mid - (scale * before.mid + shift)).abs() <= tolerance(after.mid));
        let mad_before = mad(&data).unwrap();
        let mad_after = mad(&moved).unwrap();
        prop_assert!((mad_after - scale * mad_before).abs() <= tolerance(mad_after));
        let huber_before = huber_location(&data, before.mid, MAD_TO_SD * mad_before, HUBER_K).unwrap();
        let huber_after = huber_location(&moved, after.mid, MAD_TO_SD * mad_after, HUBER_K).unwrap();
        // The iteration stops within 1e-9 spreads of the fixed point, on both sides.
        let allowed = 1e-6 * (1.0 + huber_after.abs()) + 1e-7 * MAD_TO_SD * mad_after;
        prop_assert!((huber_after - (scale * huber_before + shift)).abs() <= allowed,
            "{} vs {}", huber_after, scale * huber_before + shift);
    }

    #[test]
    fn modified_z_scores_are_always_finite(data in values(), floor in prop_oneof![Just(0.0), 0.01f64..5.0]) {
        for score in modified_z_scores(&data, floor) {
            prop_assert!(score.is_finite());
        }
    }

    #[test]
    fn lad_line_is_no_worse_than_any_line_through_two_points(
        points in prop::collection::vec(((-50i32..50), (-500i32..500)), 2..14),
    ) {
        let x: Vec<f64> = points.iter().map(|p| f64::from(p.0)).collect();
        let y: Vec<f64> = points.iter().map(|p| f64::from(p.1) / 10.0).collect();
        prop_assume!(x.iter().any(|&v| v != x[0]));
        let line = least_absolute_deviations(&x, &y).unwrap();
        let best = line.total_absolute_residual(&x, &y);
        // An optimal L1 line passes through two data points, so the brute minimum over all such
        // lines is the exact optimum.
        let mut brute = f64::INFINITY;
        for i in 0..x.len() {
            for j in 0..x.len() {
                if x[j] > x[i] {
                    let slope = (y[j] - y[i]) / (x[j] - x[i]);
                    let candidate = Line { intercept: y[i] - slope * x[i], slope };
                    brute = brute.min(candidate.total_absolute_residual(&x, &y));
                }
            }
        }
        prop_assert!(best <= brute + 1e-9 * (1.0 + brute), "descent {} vs brute {}", best, brute);
    }
}
