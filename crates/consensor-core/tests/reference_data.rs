//! The line fits and the Huber estimate on real published data sets, against the reference libraries.
//! The values were printed by `tools/reference/engel_lines.py` (scipy 1.17.1, statsmodels 0.15.0,
//! numpy 2.4.6) and agree with REFERENCE.md §9.

use consensor_core::stats::{least_absolute_deviations, theil_sen};

/// The Engel food-expenditure data from `fixtures/engel.csv` (provenance in the file's header).
fn engel() -> (Vec<f64>, Vec<f64>) {
    let text = include_str!("fixtures/engel.csv");
    let mut income = Vec::new();
    let mut food = Vec::new();
    for line in text.lines().filter(|l| !l.starts_with('#')).skip(1) {
        let (x, y) = line.split_once(',').expect("two columns");
        income.push(x.parse().expect("a number"));
        food.push(y.parse().expect("a number"));
    }
    assert_eq!(income.len(), 235, "the Engel data have 235 households");
    (income, food)
}

fn close(got: f64, expected: f64, tolerance: f64, what: &str) {
    assert!(
        (got - expected).abs() <= tolerance,
        "{what}: got {got}, expected {expected}"
    );
}

#[test]
fn theil_sen_on_engel_matches_scipy() {
    // scipy 1.17.1 `theilslopes(foodexp, income, alpha=0.95)`: slope 0.5744906699969856, intercept
    // 74.70016384688915, CI [0.537396314273506, 0.6105629170034006] (REFERENCE.md §9: 0.574491,
    // 74.70016, [0.53740, 0.61056]).
    let (x, y) = engel();
    let fit = theil_sen(&x, &y, 0.95).unwrap();
    close(fit.line.slope, 0.5744906699969856, 1e-12, "slope");
    close(fit.line.intercept, 74.70016384688915, 1e-9, "intercept");
    close(fit.slope_low, 0.537396314273506, 1e-12, "slope_low");
    close(fit.slope_high, 0.6105629170034006, 1e-12, "slope_high");
}

#[test]
fn lad_on_engel_matches_the_linear_programme_and_quantreg() {
    // Exact LAD by scipy 1.17.1 `linprog(method="highs")`: intercept 81.48224741693612, slope
    // 0.5601805512094195, Σ|r| = 17559.93264762569. statsmodels 0.15.0 `QuantReg(y, X).fit(q=0.5)`
    // (IRLS, accurate to about 1e-6) gives 81.48225552736173 / 0.5601805420220306 with
    // Σ|r| = 17559.93264902816. LAD optima can be non-unique, so the objective is the primary check.
    let (x, y) = engel();
    let line = least_absolute_deviations(&x, &y).unwrap();
    let objective = line.total_absolute_residual(&x, &y);
    close(objective, 17559.93264762569, 1e-6, "Σ|r|");
    assert!(
        objective <= 17559.93264902816,
        "no worse than QuantReg's IRLS optimum"
    );
    close(line.intercept, 81.48224741693612, 1e-6, "intercept");
    close(line.slope, 0.5601805512094195, 1e-9, "slope");
}
