//! The JSON and NDJSON formats: reading objects `{station, quantity, value, unit?, observed_at}`,
//! either in a `{"readings": [...]}` envelope or one per line.

use super::json_text::{self, Node};
use super::{check_unit, Context, DecodeError, DecodedReading, FieldError};

/// The fields a reading object may have (API.md, "Ingest"); any other is an error.
pub(super) const READING_FIELDS: [&str; 5] =
    ["station", "quantity", "value", "unit", "observed_at"];

/// Decodes `{"readings": [...]}`. A body that is well-formed JSON of the wrong shape is a 422
/// (API.md), reported at index 0 with field `readings` unless a member name is at fault.
pub(super) fn decode_json(
    body: &[u8],
    context: &Context<'_>,
    errors: &mut Vec<FieldError>,
) -> Result<Vec<(usize, DecodedReading)>, DecodeError> {
    let node =
        json_text::parse(body).map_err(|error| DecodeError::Malformed(format!("JSON, {error}")))?;
    let Node::Object(members) = node else {
        errors.push(FieldError {
            index: 0,
            field: "readings".into(),
            reason: format!(
                "the body must be an object {{\"readings\": [...]}}, not {}",
                node.kind()
            ),
        });
        return Ok(Vec::new());
    };
    let mut readings_array = None;
    for (name, value) in members {
        match (&*name, value) {
            ("readings", _) if readings_array.is_some() => errors.push(FieldError {
                index: 0,
                field: name.into_owned(),
                reason: "appears more than once".into(),
            }),
            ("readings", Node::Array(items)) => readings_array = Some(items),
            ("readings", other) => {
                errors.push(FieldError {
                    index: 0,
                    field: name.into_owned(),
                    reason: format!("must be an array of readings, not {}", other.kind()),
                });
                readings_array = Some(Vec::new());
            }
            _ => errors.push(FieldError {
                index: 0,
                field: name.into_owned(),
                reason: "unknown field; the body is {\"readings\": [...]} and nothing else".into(),
            }),
        }
    }
    let Some(items) = readings_array else {
        errors.push(FieldError {
            index: 0,
            field: "readings".into(),
            reason: "missing; the body is {\"readings\": [...]}".into(),
        });
        return Ok(Vec::new());
    };
    if items.len() > context.limits.max_readings {
        return Err(context.too_many_readings(context.limits.max_readings, "readings"));
    }
    Ok(items
        .into_iter()
        .enumerate()
        .filter_map(|(index, item)| {
            reading_from_node(index, item, context, errors).map(|reading| (index, reading))
        })
        .collect())
}

/// Decodes NDJSON: one reading object per line. Blank lines (a trailing newline included) are
/// skipped; a carriage return before the newline is tolerated (common practice for line-based
/// formats written on Windows). Readings are indexed in order of the non-blank lines, and errors name
/// the line number of the body as well.
pub(super) fn decode_ndjson(
    body: &[u8],
    context: &Context<'_>,
    errors: &mut Vec<FieldError>,
) -> Result<Vec<(usize, DecodedReading)>, DecodeError> {
    let mut readings = Vec::new();
    let mut index = 0;
    for (line_index, line) in body.split(|&b| b == b'\n').enumerate() {
        if line.iter().all(|b| matches!(b, b' ' | b'\t' | b'\r')) {
            continue;
        }
        if index == context.limits.max_readings {
            return Err(context.too_many_readings(index, "reading"));
        }
        let line_number = line_index + 1;
        let node = json_text::parse(line).map_err(|error| {
            DecodeError::Malformed(format!(
                "NDJSON line {line_number} is not a JSON text: column {}: {}",
                error.column, error.what
            ))
        })?;
        if let Some(reading) = reading_from_node(index, node, context, errors) {
            readings.push((index, reading));
        }
        index += 1;
    }
    Ok(readings)
}

/// Checks one reading object, pushing every problem found to `errors`; returns the reading when it
/// has none.
pub(super) fn reading_from_node(
    index: usize,
    node: Node,
    context: &Context<'_>,
    errors: &mut Vec<FieldError>,
) -> Option<DecodedReading> {
    let errors_before = errors.len();
    let mut fail = |field: &str, reason: String| {
        errors.push(FieldError {
            index,
            field: field.to_owned(),
            reason,
        })
    };
    let Node::Object(members) = node else {
        fail(
            "reading",
            format!(
                "a reading must be an object {{station, quantity, value, unit, observed_at}}, not {}",
                node.kind()
            ),
        );
        return None;
    };

    // Sort the members into the five known fields, refusing unknown and repeated ones (API.md:
    // unknown fields are an error; a repeated one would leave it ambiguous which value counts).
    let mut fields: [Option<Node>; 5] = Default::default();
    for (name, value) in members {
        match READING_FIELDS.iter().position(|known| *known == name) {
            Some(slot) if fields[slot].is_some() => fail(&name, "appears more than once".into()),
            Some(slot) => fields[slot] = Some(value),
            None => fail(
                &name,
                "unknown field; a reading has station, quantity, value, unit and observed_at"
                    .into(),
            ),
        }
    }
    let [station, quantity, value, unit, observed_at] = fields;

    let mut id = |field: &str, node: Option<Node>| match node {
        Some(Node::String(id)) => match context.check_id(&id) {
            Ok(()) => Some(id),
            Err(reason) => {
                fail(field, reason);
                None
            }
        },
        Some(other) => {
            fail(field, format!("must be a string, not {}", other.kind()));
            None
        }
        None => {
            fail(field, "missing".into());
            None
        }
    };
    let station = id("station", station);
    let quantity = id("quantity", quantity);

    let value = match value {
        Some(Node::Number(number)) => Some(Some(number)),
        Some(Node::Null) => Some(None),
        Some(Node::OutOfRange(token)) => {
            fail(
                "value",
                format!("the number {token} is out of range for a 64-bit float"),
            );
            None
        }
        Some(other) => {
            fail(
                "value",
                format!("must be a finite number or null, not {}", other.kind()),
            );
            None
        }
        None => {
            fail(
                "value",
                "missing; send null when the station has no value".into(),
            );
            None
        }
    };

    // `"unit": null` means the same as leaving the unit out, as an optional field usually does.
    let unit = match unit {
        None | Some(Node::Null) => Some(None),
        Some(Node::String(unit)) => match check_unit(&unit) {
            Ok(()) => Some(Some(unit)),
            Err(reason) => {
                fail("unit", reason);
                None
            }
        },
        Some(other) => {
            fail("unit", format!("must be a string, not {}", other.kind()));
            None
        }
    };

    let observed_at_ms = match observed_at {
        Some(Node::String(text)) => match parse_rfc3339_ms(&text) {
            Ok(ms) => match context.check_not_in_future(ms) {
                Ok(()) => Some(ms),
                Err(reason) => {
                    fail("observed_at", format!("{text}: {reason}"));
                    None
                }
            },
            Err(reason) => {
                fail("observed_at", reason);
                None
            }
        },
        Some(other) => {
            fail(
                "observed_at",
                format!("must be an RFC 3339 date-time string, not {}", other.kind()),
            );
            None
        }
        None => {
            fail("observed_at", "missing".into());
            None
        }
    };

    if errors.len() > errors_before {
        return None;
    }
    Some(DecodedReading {
        station: station?,
        quantity: quantity?,
        value: value?,
        unit: unit?,
        observed_at_ms: observed_at_ms?,
    })
}

/// Parses an RFC 3339 date-time with any offset into milliseconds since the Unix epoch (UTC).
/// Digits of a fraction beyond the millisecond are dropped (truncated towards the past), as
/// chrono's millisecond timestamp does. A leap second (`23:59:60`) counts as the first millisecond
/// of the next minute's second, since Unix time has no leap seconds (POSIX, common practice).
pub(super) fn parse_rfc3339_ms(text: &str) -> Result<i64, String> {
    chrono::DateTime::parse_from_rfc3339(text)
        .map(|time| time.timestamp_millis())
        .map_err(|error| {
            format!("{text:?} is not an RFC 3339 date-time such as 2026-06-01T07:00:00Z ({error})")
        })
}

#[cfg(test)]
mod tests {
    use super::super::{decode, BodyFormat, DecodeLimits};
    use super::*;

    /// 2026-06-01T07:00:00Z in milliseconds since the epoch (GNU date 9.1: `date -u -d
    /// 2026-06-01T07:00:00Z +%s%3N`).
    const NOW_MS: i64 = 1_780_297_200_000;

    fn decode_json_text(text: &str) -> Result<Vec<DecodedReading>, DecodeError> {
        decode(
            BodyFormat::Json,
            text.as_bytes(),
            NOW_MS,
            &DecodeLimits::default(),
        )
    }

    fn reading(
        station: &str,
        quantity: &str,
        value: Option<f64>,
        unit: Option<&str>,
        observed_at_ms: i64,
    ) -> DecodedReading {
        DecodedReading {
            station: station.into(),
            quantity: quantity.into(),
            value,
            unit: unit.map(Into::into),
            observed_at_ms,
        }
    }

    /// Checks that a JSON body decodes to exactly these readings.
    #[track_caller]
    fn check_ok(text: &str, expected: &[DecodedReading]) {
        assert_eq!(decode_json_text(text), Ok(expected.to_vec()), "{text}");
    }

    /// Checks that a JSON body is refused with exactly these `(index, field)` pairs, and that each
    /// reason contains the matching fragment.
    #[track_caller]
    fn check_invalid(text: &str, expected: &[(usize, &str, &str)]) {
        match decode_json_text(text) {
            Err(DecodeError::Invalid(errors)) => {
                let actual: Vec<(usize, &str)> = errors
                    .iter()
                    .map(|error| (error.index, error.field.as_str()))
                    .collect();
                let wanted: Vec<(usize, &str)> =
                    expected.iter().map(|(i, field, _)| (*i, *field)).collect();
                assert_eq!(actual, wanted, "{text}: {errors:?}");
                for (error, (_, _, fragment)) in errors.iter().zip(expected) {
                    assert!(
                        error.reason.contains(fragment),
                        "{text}: reason {:?} lacks {fragment:?}",
                        error.reason
                    );
                }
            }
            other => panic!("{text}: expected Invalid, got {other:?}"),
        }
    }

    #[track_caller]
    fn check_malformed(format: BodyFormat, text: &str, fragment: &str) {
        match decode(format, text.as_bytes(), NOW_MS, &DecodeLimits::default()) {
            Err(DecodeError::Malformed(message)) => {
                assert!(message.contains(fragment), "{text}: {message}")
            }
            other => panic!("{text}: expected Malformed, got {other:?}"),
        }
    }

    #[test]
    fn the_api_example_decodes() {
        // API.md "Ingest" example body, verbatim.
        check_ok(
            r#"{"readings": [{"station": "ST-014", "quantity": "air_temperature", "value": 13.9,
                "unit": "Cel", "observed_at": "2026-06-01T07:00:00Z"}]}"#,
            &[reading(
                "ST-014",
                "air_temperature",
                Some(13.9),
                Some("Cel"),
                NOW_MS,
            )],
        );
    }

    #[test]
    fn optional_and_null_fields() {
        // API.md: `unit` optional; `value` may be null ("no value").
        check_ok(
            r#"{"readings": [
                {"station": "ST-1", "quantity": "wind_speed", "value": null, "observed_at": "2026-06-01T07:00:00Z"},
                {"station": "ST-1", "quantity": "wind_speed", "value": -999, "unit": null, "observed_at": "2026-06-01T07:00:00Z"}
            ]}"#,
            &[
                reading("ST-1", "wind_speed", None, None, NOW_MS),
                // API.md: implausible values such as -999 are not input errors.
                reading("ST-1", "wind_speed", Some(-999.0), None, NOW_MS),
            ],
        );
    }

    #[test]
    fn observation_times_accept_any_rfc3339_offset() {
        // RFC 3339 §5.8 examples (quoted from memory; the same strings appear in many parsers' test
        // suites), with epoch milliseconds from GNU date 9.1 (`date -u -d ... +%s%3N`):
        // 1985-04-12T23:20:50.52Z = 482196050520; 1996-12-19T16:39:57-08:00 = 851042397000.
        // 1937-01-01T12:00:27.87+00:20 is 11:40:27.87 UTC: 1937-01-01T00:00:00Z = -1041379200 s
        // (GNU date) plus 42027.87 s = -1041337172130 ms.
        // 1990-12-31T23:59:60Z is a leap second, which Unix time folds into the next second:
        // 1991-01-01T00:00:00Z = 662688000000 (GNU date; POSIX has no leap seconds).
        for (text, expected_ms) in [
            ("1985-04-12T23:20:50.52Z", 482_196_050_520),
            ("1996-12-19T16:39:57-08:00", 851_042_397_000),
            ("1937-01-01T12:00:27.87+00:20", -1_041_337_172_130),
            ("1990-12-31T23:59:60Z", 662_688_000_000),
            ("1990-12-31T15:59:60-08:00", 662_688_000_000),
            // RFC 3339 §5.6 NOTE: "T" and "Z" may be lower case.
            ("2026-06-01t07:00:00z", NOW_MS),
            ("2026-06-01T09:00:00+02:00", NOW_MS),
            // RFC 3339 §4.3: -00:00 is UTC with the local offset unknown.
            ("2026-06-01T07:00:00-00:00", NOW_MS),
            // Digits beyond the millisecond are truncated (our rule, chrono's behaviour).
            ("2026-06-01T06:59:59.9999999Z", NOW_MS - 1),
        ] {
            assert_eq!(parse_rfc3339_ms(text), Ok(expected_ms), "{text}");
        }
    }

    #[test]
    fn observation_times_that_are_not_rfc3339() {
        // RFC 3339 §5.6 grammar: a full date, a full time and an offset with a colon are all
        // required; hour 24 and February 30 do not exist.
        for text in [
            "2026-06-01",
            "2026-06-01T07:00:00",
            "2026-06-01T07:00Z",
            "2026-06-01T07:00:00+0200",
            "2026-06-01T24:00:00Z",
            "2026-02-30T07:00:00Z",
            " 2026-06-01T07:00:00Z",
            "1780297200000",
            "",
        ] {
            assert!(parse_rfc3339_ms(text).is_err(), "{text:?}");
        }
    }

    #[test]
    fn the_future_limit_is_ten_minutes_inclusive() {
        // API.md: "more than 10 minutes in the future" is refused, so exactly 10 minutes passes.
        let body = |time: &str| {
            format!(
                r#"{{"readings": [{{"station": "S", "quantity": "q", "value": 1, "observed_at": "{time}"}}]}}"#
            )
        };
        check_ok(
            &body("2026-06-01T07:10:00Z"),
            &[reading("S", "q", Some(1.0), None, NOW_MS + 600_000)],
        );
        check_invalid(
            &body("2026-06-01T07:10:00.001Z"),
            &[(0, "observed_at", "600.001 s ahead of the server clock")],
        );
        check_invalid(
            &body("2026-06-01T09:10:00+01:00"),
            // 09:10+01:00 is 08:10Z, 70 minutes after 07:00Z.
            &[(0, "observed_at", "4200 s ahead")],
        );
        // Long past times are fine: archives are imported.
        check_ok(
            &body("1970-01-01T00:00:00Z"),
            &[reading("S", "q", Some(1.0), None, 0)],
        );
    }

    #[test]
    fn every_bad_reading_is_listed() {
        // API.md: "422 listing every bad reading by index, field and reason".
        check_invalid(
            r#"{"readings": [
                {"station": "ST 1", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"},
                {"station": "S", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"},
                {"station": "S", "quantity": "", "value": "12.5", "observed_at": "yesterday", "colour": "red"},
                {"station": "S", "quantity": "q", "value": true, "observed_at": 1780297200},
                {"station": "S", "quantity": "q", "value": [1], "observed_at": "2026-06-01T07:00:00Z", "unit": ""},
                {"station": 14, "quantity": "q", "value": {}, "observed_at": "2026-06-01T07:00:00Z", "unit": 5},
                {},
                3
            ]}"#,
            &[
                (0, "station", "not a valid id"),
                (2, "colour", "unknown field"),
                (2, "quantity", "not a valid id"),
                (2, "value", "not a string"),
                (2, "observed_at", "not an RFC 3339 date-time"),
                (3, "value", "not a boolean"),
                (3, "observed_at", "not a number"),
                (4, "value", "not an array"),
                (4, "unit", "must not be empty"),
                (5, "station", "not a number"),
                (5, "value", "not an object"),
                (5, "unit", "not a number"),
                (6, "station", "missing"),
                (6, "quantity", "missing"),
                (6, "value", "missing; send null"),
                (6, "observed_at", "missing"),
                (7, "reading", "not a number"),
            ],
        );
    }

    #[test]
    fn ids_follow_the_api_alphabet_and_length() {
        // API.md: ids are 1–64 characters of [A-Za-z0-9._-].
        let body = |station: &str| {
            format!(
                r#"{{"readings": [{{"station": "{station}", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"}}]}}"#
            )
        };
        let longest = "a".repeat(64);
        check_ok(
            &body(&longest),
            &[reading(&longest, "q", Some(1.0), None, NOW_MS)],
        );
        check_invalid(&body(&"a".repeat(65)), &[(0, "station", "1-64 characters")]);
        check_invalid(&body("ST/014"), &[(0, "station", "not a valid id")]);
        check_invalid(&body("Stätion"), &[(0, "station", "not a valid id")]);
        // A tighter configured limit applies too.
        let tight = DecodeLimits {
            max_id_len: 4,
            ..DecodeLimits::default()
        };
        let result = decode(BodyFormat::Json, body("ST-14").as_bytes(), NOW_MS, &tight);
        assert!(
            matches!(&result, Err(DecodeError::Invalid(errors)) if errors[0].reason.contains("1-4 characters")),
            "{result:?}"
        );
    }

    #[test]
    fn numbers_out_of_range_are_invalid_readings_not_malformed_bodies() {
        // API.md: "a number such as 1e999 that is out of range for a 64-bit float" is a 422.
        // IEEE 754 binary64's largest finite value is about 1.7977e308 (published constant).
        check_invalid(
            r#"{"readings": [
                {"station": "S", "quantity": "q", "value": 1.5, "observed_at": "2026-06-01T07:00:00Z"},
                {"station": "S", "quantity": "q", "value": 1e999, "observed_at": "2026-06-01T07:00:00Z"},
                {"station": "S", "quantity": "q", "value": -2E+400, "observed_at": "2026-06-01T07:00:00Z"}
            ]}"#,
            &[
                (1, "value", "1e999 is out of range for a 64-bit float"),
                (2, "value", "-2E+400 is out of range"),
            ],
        );
        // The largest finite double itself is fine.
        check_ok(
            r#"{"readings": [{"station": "S", "quantity": "q", "value": 1.7976931348623157e308, "observed_at": "2026-06-01T07:00:00Z"}]}"#,
            &[reading("S", "q", Some(f64::MAX), None, NOW_MS)],
        );
    }

    #[test]
    fn wrong_shapes_are_invalid_not_malformed() {
        // API.md: "a JSON body of the wrong shape" is a 422.
        check_invalid("[]", &[(0, "readings", "not an array")]);
        check_invalid(r#"{"readings": 3}"#, &[(0, "readings", "not a number")]);
        check_invalid("{}", &[(0, "readings", "missing")]);
        check_invalid("null", &[(0, "readings", "not null")]);
        check_invalid(
            r#"{"readings": [], "station": "S"}"#,
            &[(0, "station", "unknown field")],
        );
        check_invalid(
            r#"{"readings": [], "readings": []}"#,
            &[(0, "readings", "more than once")],
        );
        check_invalid(
            r#"{"readings": [{"station": "S", "station": "T", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"}]}"#,
            &[(0, "station", "more than once")],
        );
        assert_eq!(
            decode_json_text(r#"{"readings": []}"#),
            Err(DecodeError::Empty)
        );
    }

    #[test]
    fn malformed_bodies_say_where() {
        // RFC 8259: NaN and Infinity are not JSON; a trailing comma is not allowed.
        check_malformed(
            BodyFormat::Json,
            r#"{"readings": [NaN]}"#,
            "line 1, column 15",
        );
        check_malformed(
            BodyFormat::Json,
            "{\"readings\": [\n  1,\n]}",
            "line 3, column 1",
        );
        check_malformed(BodyFormat::Json, "", "EOF");
        check_malformed(
            BodyFormat::Json,
            r#"{"readings": []} x"#,
            "trailing characters",
        );
        // RFC 8259 §8.1: JSON text is UTF-8; a lone 0xFF byte in a string is not.
        assert!(matches!(
            decode(BodyFormat::Json, b"{\"readings\": [\"\xff\"]}", NOW_MS, &DecodeLimits::default()),
            Err(DecodeError::Malformed(message)) if message.contains("line 1")
        ));
        let deep = format!(r#"{{"readings": {}"#, "[".repeat(1_000_000));
        check_malformed(BodyFormat::Json, &deep, "nested deeper than 64");
    }

    #[test]
    fn a_byte_order_mark_is_ignored() {
        // RFC 8259 §8.1: parsers MAY ignore a byte order mark.
        let body = "\u{FEFF}{\"readings\": [{\"station\": \"S\", \"quantity\": \"q\", \"value\": 1, \"observed_at\": \"2026-06-01T07:00:00Z\"}]}";
        assert_eq!(
            decode_json_text(body),
            Ok(vec![reading("S", "q", Some(1.0), None, NOW_MS)])
        );
    }

    #[test]
    fn the_batch_size_is_limited() {
        let limits = DecodeLimits {
            max_readings: 2,
            ..DecodeLimits::default()
        };
        let one = r#"{"station": "S", "quantity": "q", "value": 1, "observed_at": "2026-06-01T07:00:00Z"}"#;
        let json = |n: usize| format!(r#"{{"readings": [{}]}}"#, vec![one; n].join(","));
        assert_eq!(
            decode(BodyFormat::Json, json(2).as_bytes(), NOW_MS, &limits).map(|r| r.len()),
            Ok(2)
        );
        let refused = decode(BodyFormat::Json, json(3).as_bytes(), NOW_MS, &limits);
        assert!(
            matches!(&refused, Err(DecodeError::Invalid(errors))
                if errors.len() == 1 && errors[0].index == 2 && errors[0].reason.contains("more than 2 readings")),
            "{refused:?}"
        );
        let ndjson = |n: usize| vec![one; n].join("\n");
        assert_eq!(
            decode(BodyFormat::Ndjson, ndjson(2).as_bytes(), NOW_MS, &limits).map(|r| r.len()),
            Ok(2)
        );
        let refused = decode(BodyFormat::Ndjson, ndjson(3).as_bytes(), NOW_MS, &limits);
        assert!(
            matches!(&refused, Err(DecodeError::Invalid(errors)) if errors[0].index == 2),
            "{refused:?}"
        );
    }

    #[test]
    fn ndjson_lines() {
        let decode_ndjson_text = |text: &str| {
            decode(
                BodyFormat::Ndjson,
                text.as_bytes(),
                NOW_MS,
                &DecodeLimits::default(),
            )
        };
        // The NDJSON convention (one JSON text per line, newline-separated; common practice): blank
        // lines and the trailing newline are skipped, CRLF is tolerated.
        let body = "\n{\"station\": \"A\", \"quantity\": \"q\", \"value\": 1, \"observed_at\": \"2026-06-01T07:00:00Z\"}\r\n\
                    \n   \n\
                    {\"station\": \"B\", \"quantity\": \"q\", \"value\": null, \"observed_at\": \"2026-06-01T07:00:00Z\"}\n";
        assert_eq!(
            decode_ndjson_text(body),
            Ok(vec![
                reading("A", "q", Some(1.0), None, NOW_MS),
                reading("B", "q", None, None, NOW_MS),
            ])
        );
        // Indices count non-blank lines: the bad reading on body line 4 is reading 1.
        let body = "{\"station\": \"A\", \"quantity\": \"q\", \"value\": 1, \"observed_at\": \"2026-06-01T07:00:00Z\"}\n\n\n\
                    {\"station\": \"B\", \"quantity\": \"q\", \"value\": 1e999, \"observed_at\": \"2026-06-01T07:00:00Z\"}\n\
                    [1]\n";
        match decode_ndjson_text(body) {
            Err(DecodeError::Invalid(errors)) => {
                let positions: Vec<_> =
                    errors.iter().map(|e| (e.index, e.field.as_str())).collect();
                assert_eq!(positions, vec![(1, "value"), (2, "reading")]);
            }
            other => panic!("{other:?}"),
        }
        // A line that is not JSON is a 400 naming the body line.
        check_malformed(
            BodyFormat::Ndjson,
            "{\"station\": \"A\"}\n\n{\"station\": \"A\",\n\"quantity\": \"q\"}\n",
            "line 3",
        );
        check_malformed(
            BodyFormat::Ndjson,
            "{}\n{} {}\n",
            "line 2 is not a JSON text: column 4",
        );
        assert_eq!(decode_ndjson_text(""), Err(DecodeError::Empty));
        assert_eq!(decode_ndjson_text("\n\r\n  \n"), Err(DecodeError::Empty));
    }
}
