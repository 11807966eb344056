//! The rules for the fields of the network description, shared by `PUT /v1/areas/{id}` and
//! `PUT /v1/stations/{id}` (http/network.rs) and the station file of `consensor import`. Each check
//! gives the reason a value is refused; each caller says it in its own form (an API error with
//! details, or the file, line and field).

use consensor_core::ids::is_valid_id;

/// The largest magnitude of a latitude, in degrees.
pub const LAT_LIMIT: f64 = 90.0;

/// The largest magnitude of a longitude, in degrees.
pub const LON_LIMIT: f64 = 180.0;

/// The largest magnitude of an elevation, in metres: the Dead Sea shore to above the highest
/// summit (common practice for a sanity bound).
pub const ELEVATION_LIMIT_M: f64 = 9000.0;

/// An area or station id: 1-64 characters of `[A-Za-z0-9._-]`.
pub fn check_id(id: &str) -> Result<(), &'static str> {
    if is_valid_id(id) {
        Ok(())
    } else {
        Err("must be 1-64 characters of A-Z a-z 0-9 . _ -")
    }
}

/// An area or station name: 1-200 characters, not all white space.
pub fn check_name(name: &str) -> Result<(), &'static str> {
    if name.trim().is_empty() || name.chars().count() > 200 {
        Err("must be 1-200 characters")
    } else {
        Ok(())
    }
}

/// A coordinate within `-limit..=limit` (one of the limits above); the reason leaves out the value,
/// which each caller shows as it was given.
pub fn check_coordinate(value: f64, limit: f64) -> Result<(), String> {
    if value.is_finite() && value.abs() <= limit {
        Ok(())
    } else {
        Err(format!("must be a number from -{limit} to {limit}"))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Latitude and longitude ranges: ISO 6709 (from memory); elevation: common practice. The
    // bounds themselves are valid, anything past them or not finite is not.
    #[test]
    fn coordinates_are_checked_against_their_limits() {
        assert!(check_coordinate(-90.0, LAT_LIMIT).is_ok());
        assert!(check_coordinate(180.0, LON_LIMIT).is_ok());
        assert_eq!(
            check_coordinate(90.5, LAT_LIMIT),
            Err("must be a number from -90 to 90".to_owned())
        );
        assert!(check_coordinate(f64::NAN, ELEVATION_LIMIT_M).is_err());
        assert!(check_coordinate(f64::INFINITY, ELEVATION_LIMIT_M).is_err());
    }

    // Ids: API.md ("1–64 chars of `[A-Za-z0-9._-]`"); names: common practice.
    #[test]
    fn names_and_ids_follow_the_api_rules() {
        assert!(check_name("Velloran mast 1").is_ok());
        assert_eq!(check_name("   "), Err("must be 1-200 characters"));
        assert!(check_name(&"x".repeat(200)).is_ok());
        assert!(check_name(&"x".repeat(201)).is_err());
        assert!(check_id("VB-01").is_ok());
        assert!(check_id("VB 01").is_err());
    }
}
