//! Query-string parameters of the read routes, checked by hand so that every problem gets the
//! contract's error body naming the parameter (axum's own `Query` rejection is plain text).
//!
//! The rules, shared by every route that uses this module:
//! * A parameter the route does not know, or one given twice, is a 422: a misspelt filter that was
//!   silently ignored would return a wider listing than the caller asked for, which is the same
//!   reason API.md refuses unknown JSON fields.
//! * An empty value (`?station=`) counts as absent, as HTML forms send empty fields.
//! * A value that is present but wrong (not RFC 3339, not a whole number, out of its range) is a
//!   422 with `details[0].field` naming the parameter. API.md fixes 422 for a bad `limit`, and the
//!   same status for every other parameter keeps the rule simple for clients.

use axum::extract::rejection::QueryRejection;
use axum::extract::Query;
use consensor_core::checks::QuantitySpec;

use crate::error::ApiError;
use crate::state::AppState;

/// The parsed query string of one request.
pub struct Params {
    pairs: Vec<(String, String)>,
}

/// What axum hands a handler that asks for the query as name–value pairs.
pub type RawPairs = Result<Query<Vec<(String, String)>>, QueryRejection>;

/// A 422 naming one parameter.
pub fn invalid_param(name: &str, reason: impl Into<String>) -> ApiError {
    let reason = reason.into();
    ApiError::invalid_detail(format!("query parameter `{name}`: {reason}"), name, reason)
}

impl Params {
    /// Checks the names against `allowed`; see the module documentation for the rules.
    pub fn parse(raw: RawPairs, allowed: &[&str]) -> Result<Params, ApiError> {
        let Query(pairs) = raw.map_err(|rejection| ApiError::bad_request(rejection.body_text()))?;
        for (index, (name, _)) in pairs.iter().enumerate() {
            if !allowed.contains(&name.as_str()) {
                return Err(invalid_param(
                    name,
                    format!("unknown parameter; this route takes {}", allowed.join(", ")),
                ));
            }
            if pairs[..index].iter().any(|(earlier, _)| earlier == name) {
                return Err(invalid_param(name, "given more than once"));
            }
        }
        Ok(Params {
            pairs: pairs
                .into_iter()
                .filter(|(_, value)| !value.is_empty())
                .collect(),
        })
    }

    /// The value of `name`, if given and not empty.
    pub fn text(&self, name: &str) -> Option<&str> {
        self.pairs
            .iter()
            .find(|(key, _)| key == name)
            .map(|(_, value)| value.as_str())
    }

    /// The value of `name`, which the route cannot do without.
    pub fn required(&self, name: &str) -> Result<&str, ApiError> {
        self.text(name)
            .ok_or_else(|| invalid_param(name, "this parameter is required"))
    }

    /// An RFC 3339 time (any offset) as epoch milliseconds; sub-millisecond digits are dropped.
    pub fn time(&self, name: &str) -> Result<Option<i64>, ApiError> {
        self.text(name)
            .map(|text| parse_time(name, text))
            .transpose()
    }

    /// A required RFC 3339 time as epoch milliseconds.
    pub fn required_time(&self, name: &str) -> Result<i64, ApiError> {
        parse_time(name, self.required(name)?)
    }

    /// The required range `[from, to)` as epoch milliseconds, `to` later than `from`.
    pub fn required_range(&self) -> Result<(i64, i64), ApiError> {
        let from_ms = self.required_time("from")?;
        let to_ms = self.required_time("to")?;
        check_range(Some(from_ms), Some(to_ms))?;
        Ok((from_ms, to_ms))
    }

    /// A whole number from `min` to `max` inclusive, or `default` when absent.
    pub fn integer_in(
        &self,
        name: &str,
        min: i64,
        max: i64,
        default: i64,
    ) -> Result<i64, ApiError> {
        match self.text(name) {
            None => Ok(default),
            Some(text) => match text.parse::<i64>() {
                Ok(value) if (min..=max).contains(&value) => Ok(value),
                // An unbounded parameter says so rather than quoting the largest 64-bit integer.
                _ if max == i64::MAX => Err(invalid_param(
                    name,
                    format!("{text:?} is not a whole number of at least {min}"),
                )),
                _ => Err(invalid_param(
                    name,
                    format!("{text:?} is not a whole number from {min} to {max}"),
                )),
            },
        }
    }

    /// A quantity of the table in force; unknown keys are a 422 that lists the known ones.
    pub fn quantity<'a>(
        &self,
        state: &'a AppState,
        name: &str,
    ) -> Result<Option<&'a QuantitySpec>, ApiError> {
        self.text(name)
            .map(|key| known_quantity(state, name, key))
            .transpose()
    }

    /// A required quantity of the table in force.
    pub fn required_quantity<'a>(
        &self,
        state: &'a AppState,
        name: &str,
    ) -> Result<&'a QuantitySpec, ApiError> {
        known_quantity(state, name, self.required(name)?)
    }
}

fn known_quantity<'a>(
    state: &'a AppState,
    name: &str,
    key: &str,
) -> Result<&'a QuantitySpec, ApiError> {
    state.config.quantity(key).ok_or_else(|| {
        let known: Vec<&str> = state
            .config
            .quantities
            .iter()
            .map(|q| q.key.as_str())
            .collect();
        invalid_param(
            name,
            format!("unknown quantity {key:?}; known: {}", known.join(", ")),
        )
    })
}

/// Parses RFC 3339 text with any offset into epoch milliseconds.
///
/// A `+` in a query string decodes to a space, so `...T09:00:00+02:00` sent without percent-encoding
/// arrives as `...T09:00:00 02:00`. A space can never stand before the offset in RFC 3339, so when
/// the text does not parse as it is, the last space is read as the `+` it must have been.
pub fn parse_time(name: &str, text: &str) -> Result<i64, ApiError> {
    let repaired = || {
        let position = text.rfind(' ')?;
        let mut fixed = text.to_owned();
        fixed.replace_range(position..=position, "+");
        chrono::DateTime::parse_from_rfc3339(&fixed).ok()
    };
    chrono::DateTime::parse_from_rfc3339(text)
        .ok()
        .or_else(repaired)
        .map(|time| time.timestamp_millis())
        .ok_or_else(|| {
            invalid_param(
                name,
                format!("{text:?} is not an RFC 3339 time such as 2026-06-01T07:00:00Z"),
            )
        })
}

/// Refuses a range whose end is not after its start.
pub fn check_range(from_ms: Option<i64>, to_ms: Option<i64>) -> Result<(), ApiError> {
    match (from_ms, to_ms) {
        (Some(from), Some(to)) if to <= from => Err(invalid_param(
            "to",
            "must be later than `from` (`from` is inclusive, `to` exclusive)",
        )),
        _ => Ok(()),
    }
}
