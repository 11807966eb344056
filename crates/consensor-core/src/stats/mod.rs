//! Robust statistics on slices of `f64`: pure functions, no I/O.

pub mod ci;
pub mod circular;
pub mod location;
pub mod median;
pub mod regression;
pub mod scale;
pub mod weighted;

pub use ci::{median_ci, median_ci_rank, order_statistic_coverage, OrderStatisticInterval};
pub use location::{compensated_sum, huber_location, mean, HUBER_K};
pub use median::{median, median_by_sorting, median_range, median_range_in_place, MedianRange};
pub use regression::{least_absolute_deviations, theil_sen, Line, LineFitError, TheilSen};
pub use scale::{
    mad, modified_z_scores, robust_scale, RobustScale, MAD_TO_SD, MEAN_AD_TO_SD, MODIFIED_Z_LIMIT,
};
pub use weighted::lower_weighted_median;

#[cfg(test)]
pub(crate) mod tests_data {
    /// The MASS `chem` data (Venables & Ripley, *Modern Applied Statistics with S*; R dataset
    /// `MASS::chem`): 24 determinations of copper in wholemeal flour, in parts per million, as printed
    /// in the statsmodels `robust.scale.huber` example (REFERENCE.md §10).
    pub const CHEM: [f64; 24] = [
        2.20, 2.20, 2.4, 2.4, 2.5, 2.7, 2.8, 2.9, 3.03, 3.03, 3.10, 3.37, 3.4, 3.4, 3.4, 3.5, 3.6,
        3.7, 3.7, 3.7, 3.7, 3.77, 5.28, 28.95,
    ];

    /// The worked example of Leys et al. (2013), J. Exp. Soc. Psychol. 49(4), 764–766.
    pub const LEYS: [f64; 8] = [1.0, 3.0, 3.0, 6.0, 8.0, 10.0, 10.0, 1000.0];
}
