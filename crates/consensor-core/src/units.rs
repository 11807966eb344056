//! Conversion of a reading's value from the unit a station sent to the quantity's canonical unit.
//!
//! Units are case-sensitive UCUM codes (the Unified Code for Units of Measure, "c/s" variant), the
//! spelling API.md uses: `Cel`, `[degF]`, `hPa`, `[mi_i]/h`, `ug/m3`… Only the units a field station
//! plausibly sends for the quantities of the built-in table are known; a conversion is allowed only
//! between two units of the same dimension, so a temperature can never be stored as a pressure.
//!
//! Every unit is defined by an exact ratio to a reference unit of its dimension, written as a
//! numerator and a denominator that are both exactly representable as `f64` (integers below 2^53
//! or powers of ten that are exact), plus an offset for the temperature scales. Combining the two
//! ratios before multiplying keeps a conversion to two roundings, so the results stay within a few
//! units in the last place of the exact definitions.

/// Why a value could not be converted.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum UnitError {
    /// The unit is not one this module knows.
    #[error("unknown unit {0:?}")]
    Unknown(String),
    /// Both units are known but measure different things (a temperature and a pressure, say).
    #[error("unit {from:?} cannot be converted to {to:?}: they measure different quantities")]
    Incompatible { from: String, to: String },
    /// The value, or the converted value, is not a finite number.
    #[error("{value} {from} does not convert to a finite number of {to}")]
    NotFinite {
        value: f64,
        from: String,
        to: String,
    },
}

/// Converts `value` from `from_unit` to `to_unit`.
///
/// Two equal unit strings convert by identity even when the unit is not known here, so a quantity
/// table overridden in the configuration may use units this module has never heard of, as long as
/// the stations send that same unit. The result is always finite; a NaN or infinite input, or an
/// overflow, is an error.
pub fn convert(value: f64, from_unit: &str, to_unit: &str) -> Result<f64, UnitError> {
    let not_finite = || UnitError::NotFinite {
        value,
        from: from_unit.to_owned(),
        to: to_unit.to_owned(),
    };
    if !value.is_finite() {
        return Err(not_finite());
    }
    if from_unit == to_unit {
        return Ok(value);
    }
    let from = lookup(from_unit).ok_or_else(|| UnitError::Unknown(from_unit.to_owned()))?;
    let to = lookup(to_unit).ok_or_else(|| UnitError::Unknown(to_unit.to_owned()))?;
    if from.dimension != to.dimension {
        return Err(UnitError::Incompatible {
            from: from_unit.to_owned(),
            to: to_unit.to_owned(),
        });
    }
    let converted = if from.offset == 0.0 && to.offset == 0.0 {
        // One combined factor: the product of two exact integers is exact while it stays below
        // 2^53, so the factor is the correctly rounded ratio and the result has two roundings.
        let factor = (from.numerator * to.denominator) / (from.denominator * to.numerator);
        value * factor
    } else {
        // Temperature scales have an offset: go through the reference scale (degrees Celsius).
        let reference = (value - from.offset) * from.numerator / from.denominator;
        reference * to.denominator / to.numerator + to.offset
    };
    if converted.is_finite() {
        Ok(converted)
    } else {
        Err(not_finite())
    }
}

/// Whether `unit` is one of the UCUM codes this module can convert.
pub fn is_known_unit(unit: &str) -> bool {
    lookup(unit).is_some()
}

/// Whether a value in `from_unit` can be converted to `to_unit` (equal strings always can).
pub fn are_convertible(from_unit: &str, to_unit: &str) -> bool {
    from_unit == to_unit
        || matches!(
            (lookup(from_unit), lookup(to_unit)),
            (Some(from), Some(to)) if from.dimension == to.dimension
        )
}

/// What a unit measures; conversions never cross dimensions.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Dimension {
    Temperature,
    Pressure,
    Speed,
    Length,
    Angle,
    Fraction,
    Irradiance,
    MassConcentration,
}

/// One unit: a value `x` in it is `(x - offset) * numerator / denominator` in the reference unit of
/// its dimension (Cel, Pa, m/s, m, deg, 1, W/m2, ug/m3).
struct UnitDefinition {
    code: &'static str,
    dimension: Dimension,
    numerator: f64,
    denominator: f64,
    offset: f64,
}

const fn linear(
    code: &'static str,
    dimension: Dimension,
    numerator: f64,
    denominator: f64,
) -> UnitDefinition {
    UnitDefinition {
        code,
        dimension,
        numerator,
        denominator,
        offset: 0.0,
    }
}

/// The known units with the exact definitions they rest on.
const UNITS: &[UnitDefinition] = &[
    // Temperature, reference Cel. Exact definitions (UCUM; NIST SP 811 §4.2.1.1 and B.9):
    // t/°C = T/K − 273.15, and t/°F = (t/°C)·9/5 + 32, i.e. [degF] = 5/9 K with the zero at
    // 459.67 °F below the zero of the kelvin scale.
    linear("Cel", Dimension::Temperature, 1.0, 1.0),
    UnitDefinition {
        code: "K",
        dimension: Dimension::Temperature,
        numerator: 1.0,
        denominator: 1.0,
        offset: 273.15,
    },
    UnitDefinition {
        code: "[degF]",
        dimension: Dimension::Temperature,
        numerator: 5.0,
        denominator: 9.0,
        offset: 32.0,
    },
    // Pressure, reference Pa. hPa, kPa, mbar and bar are SI or SI-prefixed units, exact by
    // definition (bar = 10^5 Pa, NIST SP 811 Table 8); atm = 101 325 Pa exactly (standard
    // atmosphere, 10th CGPM 1954, as UCUM defines `atm`).
    linear("Pa", Dimension::Pressure, 1.0, 1.0),
    linear("hPa", Dimension::Pressure, 100.0, 1.0),
    linear("kPa", Dimension::Pressure, 1000.0, 1.0),
    linear("mbar", Dimension::Pressure, 100.0, 1.0),
    linear("bar", Dimension::Pressure, 100_000.0, 1.0),
    linear("atm", Dimension::Pressure, 101_325.0, 1.0),
    // The conventional millimetre of mercury: a 1 mm column of density 13.5951 g/cm³ under standard
    // gravity 9.80665 m/s², i.e. 13 595.1 × 9.80665 × 0.001 Pa = 133.322387415 Pa exactly; NIST
    // SP 811 B.8 lists it rounded as 1.333 224 E+02 Pa (from memory). UCUM's table gives the rounded
    // 133.3220 kPa per metre of mercury instead, 2.9 ppm lower; barometers are not that accurate, and
    // the conventional figure is the one the project chose.
    linear(
        "mm[Hg]",
        Dimension::Pressure,
        133_322_387_415.0,
        1_000_000_000.0,
    ),
    // The conventional inch of mercury is the same column 25.4 mm high: 25.4 × 133.322387415 Pa =
    // 3386.388640341 Pa exactly. NIST SP 811 B.8 lists it rounded as 3.386 389 E+03 Pa (from memory);
    // composing it from the millimetre keeps the two mercury units consistent with each other.
    linear(
        "[in_i'Hg]",
        Dimension::Pressure,
        33_863_886_403_410.0,
        10_000_000_000.0,
    ),
    // Speed, reference m/s. International mile = 1609.344 m and international foot = 0.3048 m
    // exactly (international yard and pound agreement 1959; NIST SP 811 B.8; UCUM [mi_i], [ft_i]);
    // international knot = 1 nautical mile per hour = 1852 m/h exactly (UCUM [kn_i]).
    linear("m/s", Dimension::Speed, 1.0, 1.0),
    linear("km/h", Dimension::Speed, 1000.0, 3600.0),
    linear("[mi_i]/h", Dimension::Speed, 1_609_344.0, 3_600_000.0),
    linear("[kn_i]", Dimension::Speed, 1852.0, 3600.0),
    linear("[ft_i]/s", Dimension::Speed, 3048.0, 10_000.0),
    // Length and precipitation depth, reference m. International inch = 25.4 mm exactly (NIST SP 811
    // B.8; UCUM [in_i]).
    linear("m", Dimension::Length, 1.0, 1.0),
    linear("cm", Dimension::Length, 1.0, 100.0),
    linear("mm", Dimension::Length, 1.0, 1000.0),
    linear("[in_i]", Dimension::Length, 254.0, 10_000.0),
    // Angle, reference deg. 1 rad = 180/π deg (SI; UCUM defines deg = π/180 rad).
    linear("deg", Dimension::Angle, 1.0, 1.0),
    linear("rad", Dimension::Angle, 180.0, std::f64::consts::PI),
    // Dimensionless fraction, reference `1` (UCUM's unity); % = 1/100 (UCUM `%` = 10^-2).
    linear("1", Dimension::Fraction, 1.0, 1.0),
    linear("%", Dimension::Fraction, 1.0, 100.0),
    // Irradiance, reference W/m2. UCUM writes the square as a trailing exponent, so `W/m2` and the
    // equivalent product form `W.m-2` are both valid codes; `W/m^2` is not UCUM and is not accepted.
    linear("W/m2", Dimension::Irradiance, 1.0, 1.0),
    linear("W.m-2", Dimension::Irradiance, 1.0, 1.0),
    // Mass concentration, reference ug/m3 (UCUM's `u` is the micro prefix); SI prefixes are exact.
    linear("ug/m3", Dimension::MassConcentration, 1.0, 1.0),
    linear("mg/m3", Dimension::MassConcentration, 1000.0, 1.0),
    linear("ng/m3", Dimension::MassConcentration, 1.0, 1000.0),
];

fn lookup(code: &str) -> Option<&'static UnitDefinition> {
    UNITS.iter().find(|unit| unit.code == code)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Asserts that converting `value` gives `expected` within 1e-12 relative (or 1e-12 absolute
    /// when `expected` is zero, where a relative bound means nothing).
    #[track_caller]
    fn check(value: f64, from: &str, to: &str, expected: f64) {
        let actual = convert(value, from, to).unwrap();
        let tolerance = 1e-12 * expected.abs().max(1.0);
        assert!(
            (actual - expected).abs() <= tolerance,
            "{value} {from} -> {to}: got {actual:e}, expected {expected:e}"
        );
    }

    #[test]
    fn temperature_scales_follow_their_exact_definitions() {
        // Exact definition: t/°C = (t/°F − 32)·5/9 (NIST SP 811 B.9). Freezing and boiling points of
        // water at standard pressure are 32 °F and 212 °F by construction of the scale.
        check(32.0, "[degF]", "Cel", 0.0);
        check(212.0, "[degF]", "Cel", 100.0);
        // −40 is the one temperature equal on both scales: −40·9/5 + 32 = −40 (same definition).
        check(-40.0, "[degF]", "Cel", -40.0);
        check(-40.0, "Cel", "[degF]", -40.0);
        check(100.0, "Cel", "[degF]", 212.0);
        // Exact definition: T/K = t/°C + 273.15 (NIST SP 811 §4.2.1.1).
        check(273.15, "K", "Cel", 0.0);
        check(0.0, "Cel", "K", 273.15);
        // Absolute zero is −459.67 °F (exact definition: [degF] = 5/9 K, offset 459.67).
        check(0.0, "K", "[degF]", -459.67);
        check(-459.67, "[degF]", "K", 0.0);
    }

    #[test]
    fn pressures_follow_their_exact_definitions() {
        // SI prefixes are exact: 1 kPa = 1000 Pa = 10 hPa; 1 mbar = 10^-3 × 10^5 Pa = 1 hPa.
        check(1.0, "kPa", "hPa", 10.0);
        check(1.0, "mbar", "hPa", 1.0);
        check(1013.25, "hPa", "Pa", 101_325.0);
        check(1.0, "bar", "hPa", 1000.0);
        // Standard atmosphere = 101 325 Pa exactly (10th CGPM 1954).
        check(1.0, "atm", "hPa", 1013.25);
        // Conventional mmHg = 13.5951 g/cm³ × 9.80665 m/s² × 1 mm = 133.322387415 Pa exactly.
        check(1.0, "mm[Hg]", "Pa", 133.322387415);
        check(760.0, "mm[Hg]", "hPa", 1013.250144354);
        // Conventional inHg = 25.4 conventional mmHg exactly.
        check(1.0, "[in_i'Hg]", "mm[Hg]", 25.4);
        check(1.0, "[in_i'Hg]", "Pa", 3386.388640341);
        // NIST SP 811 B.8 prints the inch of mercury as 3.386 389 E+03 Pa (from memory): agree to
        // the seven digits printed.
        let inch_of_mercury = convert(1.0, "[in_i'Hg]", "Pa").unwrap();
        assert!((inch_of_mercury - 3386.389).abs() < 0.0005);
    }

    #[test]
    fn speeds_follow_their_exact_definitions() {
        // International mile = 1609.344 m exactly, so 1 mi/h = 1609.344/3600 m/s = 0.44704 m/s.
        check(1.0, "[mi_i]/h", "m/s", 0.44704);
        // 1 km/h = 1000 m / 3600 s = 1/3.6 m/s (SI).
        check(1.0, "km/h", "m/s", 1.0 / 3.6);
        check(3.6, "km/h", "m/s", 1.0);
        // International knot = 1852 m/h exactly.
        check(1.0, "[kn_i]", "m/s", 1852.0 / 3600.0);
        check(1.0, "[kn_i]", "km/h", 1.852);
        // International foot = 0.3048 m exactly.
        check(1.0, "[ft_i]/s", "m/s", 0.3048);
        // 88 ft/s = 60 mi/h exactly (5280 ft per mile, both exact definitions).
        check(88.0, "[ft_i]/s", "[mi_i]/h", 60.0);
    }

    #[test]
    fn lengths_angles_fractions_and_concentrations() {
        // International inch = 25.4 mm exactly.
        check(1.0, "[in_i]", "mm", 25.4);
        check(1.0, "cm", "mm", 10.0);
        check(1.0, "m", "mm", 1000.0);
        // π rad = 180° (SI definition of the radian and degree).
        check(std::f64::consts::PI, "rad", "deg", 180.0);
        check(90.0, "deg", "rad", std::f64::consts::FRAC_PI_2);
        // % = 10^-2 (UCUM), so a ratio of 0.5 is 50 %.
        check(0.5, "1", "%", 50.0);
        check(100.0, "%", "1", 1.0);
        // SI prefixes: 1 mg = 1000 ug; 1000 ng = 1 ug.
        check(1.0, "mg/m3", "ug/m3", 1000.0);
        check(1000.0, "ng/m3", "ug/m3", 1.0);
        check(800.0, "W.m-2", "W/m2", 800.0);
    }

    #[test]
    fn equal_units_are_the_identity_even_when_unknown() {
        // Our own rule, documented on `convert`: configuration may use units unknown here.
        assert_eq!(convert(13.9, "Cel", "Cel"), Ok(13.9));
        assert_eq!(convert(3.3, "V", "V"), Ok(3.3));
        assert_eq!(convert(-0.0, "hPa", "hPa"), Ok(-0.0));
    }

    #[test]
    fn conversions_never_cross_dimensions() {
        assert_eq!(
            convert(1.0, "Cel", "hPa"),
            Err(UnitError::Incompatible {
                from: "Cel".into(),
                to: "hPa".into()
            })
        );
        assert!(matches!(
            convert(1.0, "mm", "m/s"),
            Err(UnitError::Incompatible { .. })
        ));
        assert!(matches!(
            convert(1.0, "%", "deg"),
            Err(UnitError::Incompatible { .. })
        ));
        assert!(!are_convertible("Cel", "hPa"));
        assert!(are_convertible("[degF]", "K"));
        assert!(are_convertible("V", "V"));
    }

    #[test]
    fn unknown_units_are_named() {
        // UCUM codes are case-sensitive: `CEL` is the case-insensitive variant, not ours; `degF`
        // without brackets and `W/m^2` are not UCUM at all.
        for unit in ["CEL", "degF", "W/m^2", "", "mph", "kts"] {
            assert_eq!(
                convert(1.0, unit, "Cel"),
                Err(UnitError::Unknown(unit.into())),
                "{unit:?}"
            );
            assert!(!is_known_unit(unit));
        }
        assert_eq!(
            convert(1.0, "Cel", "furlong"),
            Err(UnitError::Unknown("furlong".into()))
        );
    }

    #[test]
    fn results_are_finite_or_an_error() {
        assert!(matches!(
            convert(f64::NAN, "Cel", "K"),
            Err(UnitError::NotFinite { .. })
        ));
        assert!(matches!(
            convert(f64::INFINITY, "Cel", "Cel"),
            Err(UnitError::NotFinite { .. })
        ));
        // f64::MAX hPa is more pascals than an f64 can hold.
        assert!(matches!(
            convert(f64::MAX, "hPa", "Pa"),
            Err(UnitError::NotFinite { .. })
        ));
        assert_eq!(convert(f64::MAX, "Pa", "hPa"), Ok(f64::MAX / 100.0));
    }

    #[test]
    fn every_canonical_unit_of_the_quantity_table_is_known() {
        for quantity in crate::checks::default_quantities() {
            assert!(
                is_known_unit(&quantity.unit),
                "{}: {}",
                quantity.key,
                quantity.unit
            );
        }
    }

    #[test]
    fn round_trips_return_the_value() {
        // Converting there and back must give the value again (to rounding), for every pair of
        // units of one dimension; a property of any correct table, common practice to test.
        for from in UNITS {
            for to in UNITS.iter().filter(|to| to.dimension == from.dimension) {
                for value in [-40.0, 0.0, 1.0, 13.9, 1013.25] {
                    let there = convert(value, from.code, to.code).unwrap();
                    let back = convert(there, to.code, from.code).unwrap();
                    let tolerance = 1e-12 * value.abs().max(1.0) * 1000.0;
                    assert!(
                        (back - value).abs() <= tolerance,
                        "{value} {} -> {} -> back gave {back}",
                        from.code,
                        to.code
                    );
                }
            }
        }
    }
}
