//! Readings that arrive one at a time, as the lines of a file `consensor import` reads: an NDJSON
//! line holds the same reading object as the HTTP NDJSON body, and a CSV row is turned into that
//! object and checked by the very same code ([`super::readings`]), so the rules cannot drift apart.

use super::json_text::{self, Node};
use super::readings::reading_from_node;
use super::{Context, DecodeError, DecodeLimits, DecodedReading, FieldError};

/// The fields of one reading given as text, as a CSV row holds them.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct TextReading<'a> {
    pub station: &'a str,
    pub quantity: &'a str,
    pub observed_at: &'a str,
    /// A number written as JSON writes it (`13.9`, `-2.5e1`); empty for "no value".
    pub value: &'a str,
    /// The UCUM code; `None` or empty for the quantity's canonical unit.
    pub unit: Option<&'a str>,
}

/// Decodes one line of an NDJSON file: `Ok(None)` for a blank line, the reading when the line holds
/// a valid reading object, `Malformed` when it is not a JSON text, `Invalid` (every bad field, each
/// with index 0) when the object is not a valid reading.
pub fn decode_ndjson_line(
    line: &[u8],
    now_ms: i64,
    limits: &DecodeLimits,
) -> Result<Option<DecodedReading>, DecodeError> {
    if line.iter().all(|b| matches!(b, b' ' | b'\t' | b'\r')) {
        return Ok(None);
    }
    let node = json_text::parse(line).map_err(|error| {
        DecodeError::Malformed(format!(
            "not a JSON text: column {}: {}",
            error.column, error.what
        ))
    })?;
    checked(node, now_ms, limits).map(Some)
}

/// Decodes the fields of one CSV row by the rules of a JSON reading object: `Invalid` lists every
/// bad field (each with index 0), in the order station, quantity, value, unit, observed_at.
pub fn decode_text_reading(
    fields: &TextReading<'_>,
    now_ms: i64,
    limits: &DecodeLimits,
) -> Result<DecodedReading, DecodeError> {
    // A value that is no number is reported beside the errors of the other fields, as a JSON
    // reading with several bad fields is: the rest of the row is checked with no value.
    let mut value_error = None;
    let value = if fields.value.is_empty() {
        Node::Null
    } else {
        // The value is read as a JSON number token, so `1e999` is out of range exactly as it is in
        // a JSON body, and `NaN`, `inf` or `0x10` are refused as they are there.
        match json_text::parse(fields.value.as_bytes()) {
            Ok(node @ (Node::Number(_) | Node::OutOfRange(_))) => node,
            _ => {
                value_error = Some(FieldError {
                    index: 0,
                    field: "value".into(),
                    reason: format!(
                        "{:?} is not a number such as 13.9 or -2.5e1; leave the field empty when \
                         there is no value",
                        fields.value
                    ),
                });
                Node::Null
            }
        }
    };
    let unit = match fields.unit {
        None | Some("") => Node::Null,
        Some(unit) => Node::String(unit.to_owned()),
    };
    let object = Node::Object(vec![
        ("station".into(), Node::String(fields.station.to_owned())),
        ("quantity".into(), Node::String(fields.quantity.to_owned())),
        ("value".into(), value),
        ("unit".into(), unit),
        (
            "observed_at".into(),
            Node::String(fields.observed_at.to_owned()),
        ),
    ]);
    let result = checked(object, now_ms, limits);
    let Some(value_error) = value_error else {
        return result;
    };
    let mut errors = match result {
        Ok(_) => Vec::new(),
        Err(DecodeError::Invalid(errors)) => errors,
        Err(other) => return Err(other),
    };
    // In the order of the fields (station, quantity, value, unit, observed_at), as for JSON.
    let at = errors
        .iter()
        .position(|error| !matches!(error.field.as_str(), "station" | "quantity"))
        .unwrap_or(errors.len());
    errors.insert(at, value_error);
    Err(DecodeError::Invalid(errors))
}

fn checked(node: Node, now_ms: i64, limits: &DecodeLimits) -> Result<DecodedReading, DecodeError> {
    let context = Context { now_ms, limits };
    let mut errors = Vec::new();
    match reading_from_node(0, node, &context, &mut errors) {
        Some(reading) if errors.is_empty() => Ok(reading),
        _ => Err(DecodeError::Invalid(errors)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// 2026-06-01T07:00:00Z in milliseconds since the epoch (GNU date 9.1).
    const NOW_MS: i64 = 1_780_297_200_000;

    fn row<'a>(value: &'a str, unit: Option<&'a str>, observed_at: &'a str) -> TextReading<'a> {
        TextReading {
            station: "ST-014",
            quantity: "air_temperature",
            observed_at,
            value,
            unit,
        }
    }

    #[track_caller]
    fn check_invalid(result: Result<impl std::fmt::Debug, DecodeError>, field: &str, part: &str) {
        match result {
            Err(DecodeError::Invalid(errors)) => {
                assert_eq!(errors[0].field, field, "{errors:?}");
                assert!(errors[0].reason.contains(part), "{errors:?}");
            }
            other => panic!("expected Invalid on {field}, got {other:?}"),
        }
    }

    #[test]
    fn csv_fields_follow_the_json_rules() {
        let limits = DecodeLimits::default();
        // API.md "Ingest" example reading, as a row.
        let reading = decode_text_reading(
            &row("13.9", Some("Cel"), "2026-06-01T07:00:00Z"),
            NOW_MS,
            &limits,
        )
        .unwrap();
        assert_eq!(
            reading,
            DecodedReading {
                station: "ST-014".into(),
                quantity: "air_temperature".into(),
                value: Some(13.9),
                unit: Some("Cel".into()),
                observed_at_ms: NOW_MS,
            }
        );
        // An empty value is "no value" (JSON null); an empty unit is the canonical unit (API.md).
        let reading =
            decode_text_reading(&row("", Some(""), "2026-06-01T07:00:00Z"), NOW_MS, &limits)
                .unwrap();
        assert_eq!((reading.value, reading.unit), (None, None));
        // RFC 8259 §6: JSON numbers have no NaN, infinity or hexadecimal form.
        for bad in ["NaN", "inf", "0x10", "13,9", "abc"] {
            check_invalid(
                decode_text_reading(&row(bad, None, "2026-06-01T07:00:00Z"), NOW_MS, &limits),
                "value",
                "is not a number",
            );
        }
        // 1e999 overflows a 64-bit float (IEEE 754 binary64 max is about 1.8e308).
        check_invalid(
            decode_text_reading(&row("1e999", None, "2026-06-01T07:00:00Z"), NOW_MS, &limits),
            "value",
            "out of range",
        );
        check_invalid(
            decode_text_reading(&row("1", None, "2026-06-01 07:00"), NOW_MS, &limits),
            "observed_at",
            "RFC 3339",
        );
        // API.md: more than 10 minutes ahead of the clock is refused.
        check_invalid(
            decode_text_reading(&row("1", None, "2026-06-01T07:10:01Z"), NOW_MS, &limits),
            "observed_at",
            "ahead of the server clock",
        );
        check_invalid(
            decode_text_reading(
                &row("1", Some("deg C"), "2026-06-01T07:00:00Z"),
                NOW_MS,
                &limits,
            ),
            "unit",
            "not a unit code",
        );
    }

    #[test]
    fn every_bad_field_of_a_row_is_listed() {
        // Found by `tests/fuzz_import_rows.rs`: a value that is no number used to hide the other
        // bad fields of its row. API.md "Ingest": every bad reading is listed by field and reason.
        let fields = TextReading {
            station: "ST 014",
            quantity: "air_temperature",
            observed_at: "2026-06-01 07:00",
            value: "NaN",
            unit: None,
        };
        match decode_text_reading(&fields, NOW_MS, &DecodeLimits::default()) {
            Err(DecodeError::Invalid(errors)) => {
                let named: Vec<&str> = errors.iter().map(|e| e.field.as_str()).collect();
                assert_eq!(named, ["station", "value", "observed_at"], "{errors:?}");
            }
            other => panic!("expected Invalid, got {other:?}"),
        }
    }

    #[test]
    fn ndjson_lines_decode_one_by_one() {
        let limits = DecodeLimits::default();
        assert_eq!(decode_ndjson_line(b"  \r", NOW_MS, &limits), Ok(None));
        let line = br#"{"station": "ST-014", "quantity": "air_temperature", "value": null, "observed_at": "2026-06-01T07:00:00Z"}"#;
        let reading = decode_ndjson_line(line, NOW_MS, &limits).unwrap().unwrap();
        assert_eq!(reading.value, None);
        match decode_ndjson_line(b"{\"station\": ", NOW_MS, &limits) {
            Err(DecodeError::Malformed(message)) => {
                assert!(message.starts_with("not a JSON text: column"), "{message}")
            }
            other => panic!("expected Malformed, got {other:?}"),
        }
        // API.md: unknown fields are an error.
        check_invalid(
            decode_ndjson_line(
                br#"{"station": "ST-014", "quantity": "air_temperature", "value": 1, "observed_at": "2026-06-01T07:00:00Z", "colour": 1}"#,
                NOW_MS,
                &limits,
            ),
            "colour",
            "unknown field",
        );
    }
}
