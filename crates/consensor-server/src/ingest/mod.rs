//! Decoding the bodies of `POST /v1/readings` (API.md, "Ingest") into readings, with no HTTP types:
//! the route picks a [`BodyFormat`] from the `Content-Type`, calls [`decode`], and maps a
//! [`DecodeError`] to 400, 415 or 422.
//!
//! Three formats are understood:
//! - `application/json`: `{"readings": [{"station", "quantity", "value", "unit", "observed_at"}, ...]}`;
//! - `application/x-ndjson`: one such reading object per line;
//! - `application/senml+json`: a SenML pack (RFC 8428, JSON representation), see [`senml`].
//!
//! What is checked here is everything that can be judged from the body alone: well-formedness,
//! shape, field types, ids, times and the batch size. Whether a station or quantity exists and
//! whether a unit converts to the canonical one need the configuration and the database: the caller
//! looks the stations up and [`resolve_readings`] does the rest. Whether the station may post for
//! it is the HTTP layer's business. `consensor import` decodes its files line by line with
//! [`decode_ndjson_line`] and [`decode_text_reading`] (a CSV row) and resolves them the same way.
//!
//! A batch is atomic (API.md), so decoding never stops at the first bad reading: every bad reading is
//! listed by index, field and reason, and either all readings decode or none is returned.

mod json_text;
mod readings;
mod resolve;
mod rows;
mod senml;

pub use resolve::{resolve_readings, station_keys};
pub use rows::{decode_ndjson_line, decode_text_reading, TextReading};

use std::fmt;

/// One reading as the station sent it, decoded and checked for form.
#[derive(Debug, Clone, PartialEq)]
pub struct DecodedReading {
    pub station: String,
    pub quantity: String,
    /// The value as sent; `None` when the station reported "no value" (JSON `null`).
    pub value: Option<f64>,
    /// The unit as sent; `None` when the station sent none (the canonical unit is then assumed).
    pub unit: Option<String>,
    /// When the value was observed, in milliseconds since the Unix epoch (UTC).
    pub observed_at_ms: i64,
}

/// One thing wrong with one reading.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FieldError {
    /// The 0-based position of the reading in the batch: in the `readings` array for JSON, among the
    /// non-blank lines for NDJSON, among the records of the pack for SenML. Problems with the batch
    /// as a whole (its shape, its size) carry the index of the first reading they concern, or 0.
    pub index: usize,
    /// The field at fault, as the sender spelled it (`value`, `observed_at`, `bver`…). A problem with
    /// a whole element uses `reading` (JSON, NDJSON) or `record` (SenML); a problem with the body's
    /// outer shape uses `readings` (JSON) or `pack` (SenML).
    pub field: String,
    /// A sentence saying what is wrong, with the offending value where it helps.
    pub reason: String,
}

impl fmt::Display for FieldError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "reading {}: field {}: {}",
            self.index, self.field, self.reason
        )
    }
}

/// Why a body was refused.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DecodeError {
    /// 400: the body is not well-formed JSON / NDJSON / SenML; the message says where (line and
    /// column) and what was expected.
    #[error("the body is not well-formed: {0}")]
    Malformed(String),
    /// 422: well-formed but invalid readings; every bad reading listed by index, field and reason.
    #[error("{} invalid field(s) in the batch, the first: {}", .0.len(), first_of(.0))]
    Invalid(Vec<FieldError>),
    /// 415: a `Content-Type` that is none of the three formats; holds a sentence naming the type as
    /// sent (or saying the header was missing) and the supported ones.
    #[error("{0}")]
    UnsupportedMediaType(String),
    /// 422: a batch with no reading in it.
    #[error("the batch holds no reading")]
    Empty,
}

fn first_of(errors: &[FieldError]) -> String {
    errors
        .first()
        .map_or_else(|| "none".to_owned(), ToString::to_string)
}

fn unsupported_media_type(content_type: &str) -> DecodeError {
    DecodeError::UnsupportedMediaType(if content_type.is_empty() {
        format!("the request has no Content-Type; send one of {SUPPORTED_MEDIA_TYPES}")
    } else {
        format!(
            "Content-Type {content_type:?} is not supported; send one of {SUPPORTED_MEDIA_TYPES}"
        )
    })
}

const SUPPORTED_MEDIA_TYPES: &str =
    "application/json, application/x-ndjson, application/senml+json";

/// The three body formats of `POST /v1/readings`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BodyFormat {
    Json,
    Ndjson,
    Senml,
}

/// Limits on what one body may hold.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct DecodeLimits {
    /// The most readings one batch may hold (default 100 000).
    pub max_readings: usize,
    /// How far ahead of the server clock an observation time may be, in milliseconds (default
    /// 10 minutes, API.md).
    pub max_future_ms: i64,
    /// The longest station or quantity id, in bytes (default 64). It can only tighten API.md's rule
    /// of 1–64 characters of `[A-Za-z0-9._-]`, which is always applied.
    pub max_id_len: usize,
}

impl Default for DecodeLimits {
    fn default() -> Self {
        DecodeLimits {
            max_readings: 100_000,
            max_future_ms: 10 * 60 * 1000,
            max_id_len: 64,
        }
    }
}

/// The body format for a `Content-Type` header value. Parameters (`; charset=utf-8`) are ignored and
/// the media type is compared case-insensitively, as RFC 9110 §8.3.1 says type and subtype are.
pub fn format_for_content_type(content_type: Option<&str>) -> Result<BodyFormat, DecodeError> {
    let Some(content_type) = content_type else {
        return Err(unsupported_media_type(""));
    };
    let media_type = content_type
        .split(';')
        .next()
        .unwrap_or_default()
        .trim()
        .to_ascii_lowercase();
    match media_type.as_str() {
        "application/json" => Ok(BodyFormat::Json),
        "application/x-ndjson" => Ok(BodyFormat::Ndjson),
        "application/senml+json" => Ok(BodyFormat::Senml),
        _ => Err(unsupported_media_type(content_type.trim())),
    }
}

/// Decodes a body in `format` into readings, judging observation times against `now_ms` (the
/// server clock, milliseconds since the Unix epoch; also "now" for SenML relative times).
///
/// All or nothing: either every reading decodes, or the answer lists every bad one.
pub fn decode(
    format: BodyFormat,
    body: &[u8],
    now_ms: i64,
    limits: &DecodeLimits,
) -> Result<Vec<DecodedReading>, DecodeError> {
    let batch = decode_batch(format, body, now_ms, limits)?;
    if !batch.errors.is_empty() {
        return Err(DecodeError::Invalid(batch.errors));
    }
    Ok(batch
        .readings
        .into_iter()
        .map(|(_, reading)| reading)
        .collect())
}

/// A batch decoded as far as it goes: the readings that decoded, each with its index in the batch
/// (the same index [`FieldError`] uses), and the field errors of the others.
#[derive(Debug, Clone, PartialEq)]
pub struct DecodedBatch {
    pub readings: Vec<(usize, DecodedReading)>,
    pub errors: Vec<FieldError>,
}

/// Like [`decode`], but returns the readings that decoded beside the field errors of the others,
/// so a caller that checks more (does the station exist, does the unit convert) can list every bad
/// reading of the batch in one answer, with indices that match the decoder's. For a SenML pack the
/// index is the record's, which differs from the position in `readings` when the pack has header
/// records. The errors that concern the body as a whole are still returned as errors: a malformed
/// body, a batch over the size limit, and a batch with neither a reading nor a field error.
pub fn decode_batch(
    format: BodyFormat,
    body: &[u8],
    now_ms: i64,
    limits: &DecodeLimits,
) -> Result<DecodedBatch, DecodeError> {
    // RFC 8259 §8.1: a parser MAY ignore a byte order mark rather than treat it as an error. Some
    // station firmware writes one, and ignoring it costs nothing.
    let body = body.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(body);
    let context = Context { now_ms, limits };
    let mut errors = Vec::new();
    let readings = match format {
        BodyFormat::Json => readings::decode_json(body, &context, &mut errors)?,
        BodyFormat::Ndjson => readings::decode_ndjson(body, &context, &mut errors)?,
        BodyFormat::Senml => senml::decode_pack(body, &context, &mut errors)?,
    };
    if readings.is_empty() && errors.is_empty() {
        return Err(DecodeError::Empty);
    }
    Ok(DecodedBatch { readings, errors })
}

/// What every format's decoder needs besides the body.
struct Context<'a> {
    now_ms: i64,
    limits: &'a DecodeLimits,
}

impl Context<'_> {
    /// The error for a batch that holds more readings than allowed, at the first one too many.
    fn too_many_readings(&self, index: usize, field: &str) -> DecodeError {
        DecodeError::Invalid(vec![FieldError {
            index,
            field: field.to_owned(),
            reason: format!(
                "the batch holds more than {} readings, the most one request may carry; split it",
                self.limits.max_readings
            ),
        }])
    }

    /// Checks a station or quantity id against API.md's rule and the configured length limit.
    fn check_id(&self, id: &str) -> Result<(), String> {
        if consensor_core::ids::is_valid_id(id) && id.len() <= self.limits.max_id_len {
            Ok(())
        } else {
            Err(format!(
                "{id:?} is not a valid id: 1-{} characters of A-Z a-z 0-9 . _ -",
                self.limits.max_id_len.min(64)
            ))
        }
    }

    /// Checks an observation time against the server clock: at most `max_future_ms` ahead.
    fn check_not_in_future(&self, observed_at_ms: i64) -> Result<(), String> {
        let ahead_ms = i128::from(observed_at_ms) - i128::from(self.now_ms);
        if ahead_ms > i128::from(self.limits.max_future_ms) {
            Err(format!(
                "the time is {} ahead of the server clock; at most {} is allowed",
                seconds(ahead_ms),
                seconds(i128::from(self.limits.max_future_ms))
            ))
        } else {
            Ok(())
        }
    }
}

/// A duration in milliseconds written in seconds, with the milliseconds only when there are any.
fn seconds(ms: i128) -> String {
    if ms % 1000 == 0 {
        format!("{} s", ms / 1000)
    } else {
        format!("{:.3} s", ms as f64 / 1000.0)
    }
}

/// Checks a unit string: non-empty, at most 64 bytes, printable ASCII without spaces. UCUM codes are
/// made of printable ASCII characters without spaces (UCUM §1, from memory); whether the unit is
/// known and converts is judged later, against the quantity's canonical unit.
fn check_unit(unit: &str) -> Result<(), String> {
    if unit.is_empty() {
        Err("must not be empty; leave the unit out to mean the canonical unit".to_owned())
    } else if unit.len() > 64 || !unit.bytes().all(|b| b.is_ascii_graphic()) {
        Err(format!(
            "{unit:?} is not a unit code: at most 64 printable ASCII characters without spaces"
        ))
    } else {
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn content_types_select_the_format() {
        // RFC 9110 §8.3.1: type and subtype are case-insensitive; parameters follow a `;`.
        #[track_caller]
        fn check(content_type: Option<&str>, expected: Result<BodyFormat, &str>) {
            let actual = format_for_content_type(content_type);
            match (actual, expected) {
                (Ok(actual), Ok(expected)) => assert_eq!(actual, expected),
                (Err(DecodeError::UnsupportedMediaType(message)), Err(fragment)) => {
                    assert!(message.contains(fragment), "{message}");
                    assert!(message.contains("application/senml+json"), "{message}");
                }
                (actual, expected) => panic!("{content_type:?}: {actual:?}, expected {expected:?}"),
            }
        }
        check(Some("application/json"), Ok(BodyFormat::Json));
        check(
            Some("application/json; charset=utf-8"),
            Ok(BodyFormat::Json),
        );
        check(Some("Application/JSON"), Ok(BodyFormat::Json));
        check(Some("application/x-ndjson"), Ok(BodyFormat::Ndjson));
        check(
            Some(" application/senml+json ;foo=bar"),
            Ok(BodyFormat::Senml),
        );
        check(Some("text/plain"), Err("\"text/plain\" is not supported"));
        // RFC 8428 §6 defines application/senml+cbor too, but only the JSON form is understood here.
        check(
            Some("application/senml+cbor"),
            Err("\"application/senml+cbor\" is not supported"),
        );
        check(None, Err("no Content-Type"));
        check(Some(""), Err("no Content-Type"));
    }

    #[test]
    fn decode_batch_keeps_the_good_readings_beside_the_errors() {
        // 2026-06-01T07:00:00Z = 1780297200000 ms (GNU date 9.1).
        let now_ms = 1_780_297_200_000;
        let limits = DecodeLimits::default();
        let body = br#"{"readings": [
            {"station": "ST-999", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"},
            {"station": "ST-014", "quantity": "q", "value": true, "observed_at": "2026-06-01T07:00:00Z"}
        ]}"#;
        let batch = decode_batch(BodyFormat::Json, body, now_ms, &limits).unwrap();
        assert_eq!(batch.readings.len(), 1);
        assert_eq!(batch.readings[0].0, 0);
        assert_eq!(batch.readings[0].1.station, "ST-999");
        assert_eq!(
            (batch.errors[0].index, batch.errors[0].field.as_str()),
            (1, "value")
        );
        // RFC 8428 §5.1.7 shape: a header record first, so the reading of record 1 keeps index 1.
        let pack = br#"[{"bn":"ST-014:"},{"n":"air_temperature","v":13.9}]"#;
        let batch = decode_batch(BodyFormat::Senml, pack, now_ms, &limits).unwrap();
        assert_eq!(batch.errors, vec![]);
        assert_eq!(batch.readings.len(), 1);
        assert_eq!(batch.readings[0].0, 1);
        assert_eq!(
            decode_batch(BodyFormat::Senml, b"[]", now_ms, &limits),
            Err(DecodeError::Empty)
        );
    }

    #[test]
    fn durations_are_written_in_seconds() {
        // Our own message format.
        assert_eq!(seconds(600_000), "600 s");
        assert_eq!(seconds(600_001), "600.001 s");
    }

    #[test]
    fn units_are_printable_ascii_codes() {
        // UCUM codes are printable ASCII without spaces (UCUM §1, from memory).
        for good in ["Cel", "[degF]", "[in_i'Hg]", "ug/m3", "%"] {
            assert_eq!(check_unit(good), Ok(()), "{good}");
        }
        for bad in ["", "deg C", "°C", "\t", &"m".repeat(65)] {
            assert!(check_unit(bad).is_err(), "{bad:?}");
        }
    }
}
