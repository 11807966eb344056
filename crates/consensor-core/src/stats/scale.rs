//! Robust scale: the median absolute deviation, its normal-consistent form, the mean absolute deviation
//! fallback, and the modified z-score built on them.

use super::median::median_range_in_place;

/// b = 1/Φ⁻¹(3/4) = 1.482602218505602, the factor that makes the MAD a consistent estimator of the
/// standard deviation of a normal distribution (Rousseeuw & Croux 1993; Φ⁻¹(0.75) = 0.6744897501960817
/// by scipy 1.17 `norm.ppf(0.75)`, REFERENCE.md §2).
pub const MAD_TO_SD: f64 = 1.482602218505602;

/// √(π/2) = 1.2533141373155001 rounded as the published fallback gives it (1.253314): for normal data
/// E|X − μ| = σ·√(2/π), so 1.253314 × MeanAD estimates σ (IBM Cognos glossary "Modified z score",
/// REFERENCE.md §3).
pub const MEAN_AD_TO_SD: f64 = 1.253314;

/// The limit on |modified z-score| above which a value is an outlier, as Iglewicz & Hoaglin recommend
/// (NIST/SEMATECH e-Handbook §1.3.5.17, REFERENCE.md §1); the comparison is strict.
pub const MODIFIED_Z_LIMIT: f64 = 3.5;

/// The robust centre and scale of a set of values, as the cross-station test uses them.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RobustScale {
    /// The median (midpoint of the minimiser range).
    pub median: f64,
    /// The raw MAD: median(|x_i − median|).
    pub mad: f64,
    /// The mean absolute deviation about the median, Σ|x_i − median| / n.
    pub mean_ad: f64,
    /// The scale the scores divide by: `max(MAD_TO_SD·mad, floor)`, or, when the MAD is 0,
    /// `max(MEAN_AD_TO_SD·mean_ad, floor)`.
    pub scale: f64,
}

impl RobustScale {
    /// The normal-consistent spread `MAD_TO_SD × mad`.
    pub fn spread(&self) -> f64 {
        MAD_TO_SD * self.mad
    }

    /// The signed score `(x − median) / scale`; never NaN or infinite for finite `x` while the floor
    /// passed to [`robust_scale`] is positive.
    pub fn score(&self, x: f64) -> f64 {
        if self.scale > 0.0 {
            (x - self.median) / self.scale
        } else if x == self.median {
            0.0
        } else {
            // Only reachable with a floor of 0 and all values equal: a value away from a spread-less
            // consensus is infinitely far in spreads; saturate rather than produce ∞ or NaN.
            f64::MAX.copysign(x - self.median)
        }
    }
}

/// The raw median absolute deviation about the median, median(|x_i − median(x)|), computed in
/// `scratch` (reused; no allocation once it has grown). `None` for no values.
///
/// This is scipy's `median_abs_deviation(x)` with its default `scale=1.0` (REFERENCE.md §2).
pub fn mad_with(values: &[f64], scratch: &mut Vec<f64>) -> Option<(f64, f64)> {
    scratch.clear();
    scratch.extend_from_slice(values);
    let centre = median_range_in_place(scratch)?.mid;
    for value in scratch.iter_mut() {
        *value = (*value - centre).abs();
    }
    let mad = median_range_in_place(scratch)?.mid;
    Some((centre, mad))
}

/// The raw MAD of `values` (allocates one copy); `None` for no values.
pub fn mad(values: &[f64]) -> Option<f64> {
    mad_with(values, &mut Vec::with_capacity(values.len())).map(|(_, mad)| mad)
}

/// The centre, raw MAD, MeanAD and floored scale of `values`, as defined on [`RobustScale`].
///
/// `floor` is the quantity's resolution floor (`min_spread`): it keeps a handful of identical or
/// near-identical station values from producing a scale of zero, which would turn a difference of
/// one instrument resolution into an "outlier" (a project choice, REFERENCE.md §3 "defensive design").
pub fn robust_scale_with(
    values: &[f64],
    floor: f64,
    scratch: &mut Vec<f64>,
) -> Option<RobustScale> {
    let (median, mad) = mad_with(values, scratch)?;
    let mean_ad = super::location::compensated_sum(values.iter().map(|x| (x - median).abs()))
        / values.len() as f64;
    let raw_scale = if mad > 0.0 {
        MAD_TO_SD * mad
    } else {
        MEAN_AD_TO_SD * mean_ad
    };
    Some(RobustScale {
        median,
        mad,
        mean_ad,
        scale: raw_scale.max(floor),
    })
}

/// [`robust_scale_with`], allocating its own scratch.
pub fn robust_scale(values: &[f64], floor: f64) -> Option<RobustScale> {
    robust_scale_with(values, floor, &mut Vec::with_capacity(values.len()))
}

/// The modified z-scores of `values`: (x − median) / (MAD_TO_SD·MAD), which is Iglewicz & Hoaglin's
/// 0.6745·(x − median)/MAD with the constant at full precision (1/1.482602218505602 = 0.67448975…);
/// when the MAD is 0, (x − median) / (1.253314·MeanAD); and never a smaller denominator than `floor`.
/// Empty input gives an empty result.
pub fn modified_z_scores(values: &[f64], floor: f64) -> Vec<f64> {
    match robust_scale(values, floor) {
        Some(robust) => values.iter().map(|&x| robust.score(x)).collect(),
        None => Vec::new(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::stats::tests_data::{CHEM, LEYS};

    fn close(got: f64, expected: f64, tolerance: f64) {
        assert!(
            (got - expected).abs() <= tolerance,
            "got {got}, expected {expected}"
        );
    }

    #[test]
    fn consistency_constant_is_the_reciprocal_normal_quartile() {
        // 1/Φ⁻¹(0.75), Φ⁻¹ from statrs; scipy 1.17 `1/norm.ppf(0.75)` = 1.482602218505602.
        use statrs::distribution::{ContinuousCDF, Normal};
        let quartile = Normal::standard().inverse_cdf(0.75);
        close(1.0 / quartile, MAD_TO_SD, 1e-12);
        // √(π/2) = 1.2533141373155001; the published fallback rounds it to 1.253314.
        close((std::f64::consts::PI / 2.0).sqrt(), MEAN_AD_TO_SD, 1e-6);
    }

    #[test]
    fn mad_matches_scipy_and_statsmodels() {
        // scipy 1.17.1 `median_abs_deviation([1,2,3,4,100])` = 1.0 (REFERENCE.md §2 [COMPUTED]).
        assert_eq!(mad(&[1.0, 2.0, 3.0, 4.0, 100.0]), Some(1.0));
        // Leys et al. (2013) worked example: raw MAD 3.5; scipy `median_abs_deviation(x,
        // scale='normal')` and statsmodels 0.15 `robust.scale.mad(x)` = 5.189107764769607.
        assert_eq!(mad(&LEYS), Some(3.5));
        close(MAD_TO_SD * 3.5, 5.189107764769607, 1e-12);
        // statsmodels 0.15 `robust.scale.mad(chem)` = 0.5263237876 (REFERENCE.md §10), so the raw MAD is
        // 0.355; scipy `median_abs_deviation(chem)` = 0.355.
        close(mad(&CHEM).unwrap(), 0.355, 1e-12);
        close(MAD_TO_SD * mad(&CHEM).unwrap(), 0.5263237876, 1e-10);
        assert_eq!(mad(&[]), None);
        assert_eq!(mad(&[7.0]), Some(0.0));
    }

    #[test]
    fn modified_z_scores_of_the_leys_data() {
        // NIST e-Handbook §1.3.5.17 formula on the Leys et al. data with the exact constant, numpy 2.4:
        // `(x - np.median(x)) / (1.482602218505602 * np.median(abs(x - np.median(x))))`. REFERENCE.md §1
        // lists the same values rounded (computed there with 0.6745): −1.1563 … 191.3624.
        let expected = [
            -1.15626814,
            -0.77084543,
            -0.77084543,
            -0.19271136,
            0.19271136,
            0.57813407,
            0.57813407,
            191.3623777,
        ];
        let scores = modified_z_scores(&LEYS, 0.0);
        for (got, want) in scores.iter().zip(expected) {
            close(*got, want, 5e-8);
        }
        // With NIST's rounded 0.6745 the last score is 191.3653; ours differs only by the rounding.
        close(0.6745 * (1000.0 - 7.0) / 3.5, 191.3653, 5e-5);
        // Only 1000 exceeds the limit of 3.5 (Leys et al. 2013; NIST e-Handbook §1.3.5.17).
        let flagged: Vec<f64> = LEYS
            .iter()
            .zip(&scores)
            .filter(|(_, score)| score.abs() > MODIFIED_Z_LIMIT)
            .map(|(x, _)| *x)
            .collect();
        assert_eq!(flagged, vec![1000.0]);
    }

    #[test]
    fn zero_mad_falls_back_to_the_mean_absolute_deviation() {
        // REFERENCE.md §3 [COMPUTED]: x = [10×7, 100]: median 10, MAD 0, MeanAD 11.25; the score of 100
        // is 90/(1.253314·11.25) = 6.3831, flagged at 3.5.
        let data = [10.0, 10.0, 10.0, 10.0, 10.0, 10.0, 10.0, 100.0];
        let robust = robust_scale(&data, 0.0).unwrap();
        assert_eq!(
            (robust.median, robust.mad, robust.mean_ad),
            (10.0, 0.0, 11.25)
        );
        close(robust.score(100.0), 6.3831, 5e-5);
        assert!(robust.score(100.0) > MODIFIED_Z_LIMIT);
    }

    #[test]
    fn identical_values_never_divide_by_zero() {
        // All equal: MAD = MeanAD = 0; the floor keeps every score finite (a project choice).
        let robust = robust_scale(&[20.0, 20.0, 20.0], 0.5).unwrap();
        assert_eq!(robust.scale, 0.5);
        assert_eq!(robust.score(20.0), 0.0);
        assert_eq!(robust.score(21.0), 2.0);
        // Even with no floor the score saturates instead of becoming infinite or NaN.
        let bare = robust_scale(&[20.0, 20.0, 20.0], 0.0).unwrap();
        assert!(bare.score(21.0).is_finite());
        assert_eq!(bare.score(20.0), 0.0);
    }
}
