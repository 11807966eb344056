//! Bounded fuzzing of everything that reads hostile text: the three ingest decoders (JSON, NDJSON,
//! SenML) through their public API, and the query-string parameters of the read routes through the
//! real server.
//!
//! Each property runs a fixed number of cases (proptest, 2000 for the decoders, fewer for the
//! routes, where a case is an HTTP round trip), so the suite runs in CI in a few seconds of debug
//! build. The properties:
//! * a valid body built from random readings decodes to exactly those readings (a round trip);
//! * arbitrary bytes, structure-aware mutations of valid bodies (bytes flipped, inserted, deleted,
//!   duplicated, truncated, hostile tokens spliced in) and random JSON trees over the decoders'
//!   field names never panic, and every outcome is well-formed: readings that pass the API.md rules,
//!   or a [`DecodeError`] with a message, or field errors that each name an index, a field and a
//!   reason;
//! * random query strings against the read routes always get an answer in the contract's error
//!   format (or a 200), never a 500 or a dropped connection.
//!
//! A failure found by proptest is saved by proptest itself under `proptest-regressions/` (commit it);
//! every crash found is also kept below as an explicit test case.

mod common;
mod mutation;

use common::{TestServer, ADMIN};
use consensor_server::ingest::{
    decode, decode_batch, BodyFormat, DecodeError, DecodeLimits, DecodedReading,
};
use mutation::{cases, Mutation};
use proptest::prelude::*;
use proptest::test_runner::{Config as ProptestConfig, FileFailurePersistence, TestRunner};
use serde_json::{json, Value};

/// 2026-06-01T07:00:00Z in epoch milliseconds (GNU date 9.1: `date -u -d 2026-06-01T07:00:00Z
/// +%s%3N`).
const NOW_MS: i64 = 1_780_297_200_000;
/// API.md: a time more than 10 minutes in the future is refused.
const MAX_FUTURE_MS: i64 = 10 * 60 * 1000;
/// RFC 8428 §4.5.3: SenML times from 2^28 s up are absolute (seconds since the Unix epoch).
const SENML_ABSOLUTE_FROM_MS: i64 = 268_435_456_000;
const FORMATS: [BodyFormat; 3] = [BodyFormat::Json, BodyFormat::Ndjson, BodyFormat::Senml];

/// Cases per decoder property: bounded so the whole file stays well under 30 s in a debug build.
const DECODER_CASES: u32 = 2000;

fn decoder_config() -> ProptestConfig {
    ProptestConfig {
        cases: cases(DECODER_CASES),
        // The shrinker stops after this many steps so a failure is reported in bounded time too.
        max_shrink_iters: 2000,
        failure_persistence: Some(Box::new(FileFailurePersistence::SourceParallel(
            "proptest-regressions",
        ))),
        ..ProptestConfig::default()
    }
}

// ---------------------------------------------------------------------------------------------
// The oracle: what every outcome of a decoder must look like.
// ---------------------------------------------------------------------------------------------

/// API.md: ids are 1–64 characters of `[A-Za-z0-9._-]`.
fn is_api_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'))
}

/// Decodes `body` in `format` with `decode` and `decode_batch` (a panic in either fails the
/// property) and checks that the outcome is well-formed and that the two agree.
fn check_clean_outcome(format: BodyFormat, body: &[u8]) -> Result<(), TestCaseError> {
    let limits = DecodeLimits::default();
    let result = decode(format, body, NOW_MS, &limits);
    let batch = decode_batch(format, body, NOW_MS, &limits);
    match &result {
        Ok(readings) => {
            prop_assert!(!readings.is_empty(), "Ok with no reading");
            for reading in readings {
                check_reading(reading)?;
            }
        }
        Err(DecodeError::Malformed(message)) => {
            prop_assert!(!message.is_empty(), "a Malformed error without a message")
        }
        Err(DecodeError::Invalid(errors)) => {
            prop_assert!(!errors.is_empty(), "an Invalid error listing nothing");
            for pair in errors.windows(2) {
                prop_assert!(
                    pair[0].index <= pair[1].index,
                    "errors out of order: {errors:?}"
                );
            }
            for error in errors {
                // The field is named as the sender spelled it, so an unknown member with an empty
                // name (`{"": 1}`) is reported with an empty field; every other error names one.
                prop_assert!(
                    !error.field.is_empty() || error.reason.starts_with("unknown field"),
                    "an error naming no field: {error:?}"
                );
                prop_assert!(
                    !error.reason.is_empty(),
                    "an error with no reason: {error:?}"
                );
            }
        }
        Err(DecodeError::Empty) => {}
        Err(DecodeError::UnsupportedMediaType(message)) => {
            prop_assert!(false, "a format was given, yet: {message}")
        }
    }
    // Display must not panic either (the message goes into the 400/422 body).
    if let Err(error) = &result {
        prop_assert!(!error.to_string().is_empty());
    }
    // decode is decode_batch with the errors turned into one Invalid: they must agree.
    match (&result, &batch) {
        (Ok(readings), Ok(batch)) => {
            prop_assert!(batch.errors.is_empty());
            let from_batch: Vec<&DecodedReading> = batch.readings.iter().map(|(_, r)| r).collect();
            prop_assert_eq!(readings.iter().collect::<Vec<_>>(), from_batch);
        }
        (Err(DecodeError::Invalid(errors)), Ok(batch)) => {
            prop_assert_eq!(errors, &batch.errors);
            for pair in batch.readings.windows(2) {
                prop_assert!(pair[0].0 < pair[1].0, "reading indices not increasing");
            }
            for (index, reading) in &batch.readings {
                check_reading(reading)?;
                prop_assert!(
                    !errors.iter().any(|error| error.index == *index),
                    "reading {index} both decoded and refused"
                );
            }
        }
        (Err(a), Err(b)) => prop_assert_eq!(a, b),
        (a, b) => prop_assert!(false, "decode {a:?} but decode_batch {b:?}"),
    }
    Ok(())
}

/// A decoded reading obeys API.md's input rules.
fn check_reading(reading: &DecodedReading) -> Result<(), TestCaseError> {
    prop_assert!(is_api_id(&reading.station), "station {:?}", reading.station);
    prop_assert!(
        is_api_id(&reading.quantity),
        "quantity {:?}",
        reading.quantity
    );
    if let Some(value) = reading.value {
        prop_assert!(value.is_finite(), "value {value}");
    }
    if let Some(unit) = &reading.unit {
        prop_assert!(
            !unit.is_empty() && unit.len() <= 64 && unit.bytes().all(|b| b.is_ascii_graphic()),
            "unit {unit:?}"
        );
    }
    prop_assert!(
        reading.observed_at_ms <= NOW_MS + MAX_FUTURE_MS,
        "a time more than 10 minutes ahead: {}",
        reading.observed_at_ms
    );
    prop_assert!(chrono::DateTime::from_timestamp_millis(reading.observed_at_ms).is_some());
    Ok(())
}

// ---------------------------------------------------------------------------------------------
// Strategies: valid readings and the bodies that carry them.
// ---------------------------------------------------------------------------------------------

fn api_id() -> impl Strategy<Value = String> {
    "[A-Za-z0-9._-]{1,64}"
}

/// A station id that can also be a SenML base name: RFC 8428 §4.5.1 wants a name to start with a
/// letter or digit.
fn senml_station_id() -> impl Strategy<Value = String> {
    "[A-Za-z0-9][A-Za-z0-9._-]{0,63}"
}

fn unit() -> impl Strategy<Value = Option<String>> {
    prop_oneof![
        Just(None),
        prop::sample::select(vec![
            "Cel", "[degF]", "%", "hPa", "m/s", "km/h", "ug/m3", "W/m2"
        ])
        .prop_map(|unit| Some(unit.to_owned())),
        "[!-~]{1,64}".prop_map(Some),
    ]
}

/// A finite value; `serde_json` writes floats in shortest round-trip form, so they decode back
/// exactly.
fn value() -> impl Strategy<Value = f64> {
    mutation::finite_value()
}

/// A valid reading with a time from the SenML absolute range up to the future limit, to the
/// millisecond.
fn reading(format: BodyFormat) -> impl Strategy<Value = DecodedReading> {
    let nullable = format != BodyFormat::Senml;
    let station = if format == BodyFormat::Senml {
        senml_station_id().boxed()
    } else {
        api_id().boxed()
    };
    let value = if nullable {
        prop_oneof![1 => Just(None), 8 => value().prop_map(Some)].boxed()
    } else {
        value().prop_map(Some).boxed()
    };
    (
        station,
        api_id(),
        value,
        unit(),
        SENML_ABSOLUTE_FROM_MS..=NOW_MS + MAX_FUTURE_MS,
    )
        .prop_map(
            |(station, quantity, value, unit, observed_at_ms)| DecodedReading {
                station,
                quantity,
                value,
                unit,
                observed_at_ms,
            },
        )
}

fn rfc3339(ms: i64) -> String {
    chrono::DateTime::from_timestamp_millis(ms)
        .unwrap()
        .to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

fn reading_object(reading: &DecodedReading) -> Value {
    let mut object = json!({
        "station": reading.station,
        "quantity": reading.quantity,
        "value": reading.value,
        "observed_at": rfc3339(reading.observed_at_ms),
    });
    if let Some(unit) = &reading.unit {
        object["unit"] = json!(unit);
    }
    object
}

/// The body that carries `readings` in `format` (API.md "Ingest"; RFC 8428 for SenML, with the
/// station in `bn` and times in seconds since the epoch).
fn body_for(format: BodyFormat, readings: &[DecodedReading]) -> Vec<u8> {
    match format {
        BodyFormat::Json => {
            let items: Vec<Value> = readings.iter().map(reading_object).collect();
            serde_json::to_vec(&json!({ "readings": items })).unwrap()
        }
        BodyFormat::Ndjson => readings
            .iter()
            .map(|reading| reading_object(reading).to_string())
            .collect::<Vec<_>>()
            .join("\n")
            .into_bytes(),
        BodyFormat::Senml => {
            let records: Vec<Value> = readings
                .iter()
                .map(|reading| {
                    let mut record = json!({
                        "bn": format!("{}:", reading.station),
                        "n": reading.quantity,
                        "v": reading.value.expect("SenML values are numeric"),
                        "t": reading.observed_at_ms as f64 / 1000.0,
                    });
                    if let Some(unit) = &reading.unit {
                        record["u"] = json!(unit);
                    }
                    record
                })
                .collect();
            serde_json::to_vec(&records).unwrap()
        }
    }
}

fn format_strategy() -> impl Strategy<Value = BodyFormat> {
    prop::sample::select(FORMATS.to_vec())
}

/// A format and a valid body for it, with the readings it carries.
fn valid_body() -> impl Strategy<Value = (BodyFormat, Vec<DecodedReading>, Vec<u8>)> {
    format_strategy().prop_flat_map(|format| {
        prop::collection::vec(reading(format), 1..6).prop_map(move |readings| {
            let body = body_for(format, &readings);
            (format, readings, body)
        })
    })
}

// ---------------------------------------------------------------------------------------------
// Structure-aware mutations.
// ---------------------------------------------------------------------------------------------

/// Text that tends to break JSON handling: out-of-range and malformed numbers, control
/// characters, lone surrogates, the decoder's own out-of-range marker, deep brackets, long runs.
const HOSTILE_TOKENS: &[&str] = &[
    "1e999",
    "-1e999",
    "1E+400",
    "1.7976931348623158e308",
    "1.7976931348623157e308",
    "-0",
    "0.0e-99999",
    "01",
    "1.",
    ".5",
    "1e",
    "NaN",
    "Infinity",
    "-",
    "null",
    "true",
    "\"\"",
    "\"\\u0000number out of range:1e999\"",
    "\"\\ud800\"",
    "\"\\uDFFF\\uD800\"",
    "\"\\",
    "\\u",
    "\"\\x\"",
    "\u{0}",
    "\u{feff}",
    "\r\n",
    "\n\n",
    "[[[[[[[[",
    "]]]]",
    "{{{{",
    "}}}}",
    "{\"\":",
    ",,",
    "::",
    "\"bn\":\"\"",
    "\"bn\":\":\"",
    "\"bver\":11",
    "\"bver\":0.5",
    "\"bt\":-1e308",
    "\"t\":1e300",
    "\"bv\":1.7976931348623157e308",
    "\"v\":1.7976931348623157e308",
    "\"x_\":1",
    "\"vs\":\"a\"",
    "\"readings\":[]",
    "\"observed_at\":\"+275760-09-13T00:00:00Z\"",
    "\"observed_at\":\"9999-12-31T23:59:60Z\"",
    "\"observed_at\":\"0000-01-01T00:00:00+23:59\"",
];

/// JSON's significant bytes are drawn more often than others: they change structure.
fn mutation() -> impl Strategy<Value = Mutation> {
    mutation::mutation(
        b"{}[]\":,\\ 0123456789eE+-.ntfu\n\r\t",
        HOSTILE_TOKENS.len(),
        16,
    )
}

// ---------------------------------------------------------------------------------------------
// Random JSON trees over the decoders' vocabulary.
// ---------------------------------------------------------------------------------------------

/// Member names the decoders know (API.md reading fields, the JSON envelope, RFC 8428 Table 2),
/// an unknown must-understand label, and unknown ones.
const NAMES: &[&str] = &[
    "readings",
    "station",
    "quantity",
    "value",
    "unit",
    "observed_at",
    "bn",
    "bt",
    "bu",
    "bv",
    "bs",
    "bver",
    "n",
    "u",
    "v",
    "vs",
    "vb",
    "vd",
    "s",
    "t",
    "ut",
    "x_",
    "",
    "colour",
];

/// Strings that are, or nearly are, what the fields expect.
const STRINGS: &[&str] = &[
    "ST-014",
    "ST-014:",
    "urn:dev:ow:ST-014:",
    "air_temperature",
    ":",
    "::",
    "a:b:c",
    "Cel",
    "[degF]",
    "",
    " ",
    "deg C",
    "°C",
    "2026-06-01T07:00:00Z",
    "2026-06-01T07:10:00.001Z",
    "2026-02-30T07:00:00Z",
    "1990-12-31T23:59:60Z",
    "+275760-09-13T00:00:00Z",
    "-262143-01-01T00:00:00Z",
    "\u{0}number out of range:1e999",
    "\u{0}",
];

fn json_leaf() -> impl Strategy<Value = Value> {
    prop_oneof![
        Just(Value::Null),
        any::<bool>().prop_map(Value::Bool),
        any::<i64>().prop_map(|v| json!(v)),
        any::<u64>().prop_map(|v| json!(v)),
        any::<f64>()
            .prop_filter("finite", |v| v.is_finite())
            .prop_map(|v| json!(v)),
        prop::sample::select(vec![
            0.0,
            -0.0,
            1.0,
            10.0,
            268_435_455.0,
            268_435_456.0,
            1_780_297_200.0,
            1_780_297_800.001,
            9.0e15,
            -9.0e15,
            f64::MAX,
            f64::MIN,
            f64::EPSILON,
        ])
        .prop_map(|v| json!(v)),
        prop::sample::select(STRINGS.to_vec()).prop_map(|s| json!(s)),
        "\\PC{0,80}".prop_map(Value::String),
        "[A-Za-z0-9._:-]{0,70}".prop_map(Value::String),
    ]
}

fn json_tree() -> impl Strategy<Value = Value> {
    json_leaf().prop_recursive(5, 64, 8, |inner| {
        prop_oneof![
            prop::collection::vec(inner.clone(), 0..8).prop_map(Value::Array),
            prop::collection::vec(
                (
                    prop_oneof![
                        4 => prop::sample::select(NAMES.to_vec()).prop_map(str::to_owned),
                        1 => "\\PC{0,12}",
                    ],
                    inner
                ),
                0..8
            )
            .prop_map(|members| Value::Object(members.into_iter().collect())),
        ]
    })
}

/// A body shaped like each format's envelope, with random trees where the readings go.
fn tree_body() -> impl Strategy<Value = (BodyFormat, Vec<u8>)> {
    (
        format_strategy(),
        prop::collection::vec(json_tree(), 0..6),
        any::<bool>(),
    )
        .prop_map(|(format, items, wrap)| {
            let body = match (format, wrap) {
                (BodyFormat::Json, true) => json!({ "readings": items }).to_string(),
                (BodyFormat::Ndjson, _) => items
                    .iter()
                    .map(Value::to_string)
                    .collect::<Vec<_>>()
                    .join("\n"),
                (_, _) => Value::Array(items).to_string(),
            };
            (format, body.into_bytes())
        })
}

// ---------------------------------------------------------------------------------------------
// The decoder properties.
// ---------------------------------------------------------------------------------------------

proptest! {
    #![proptest_config(decoder_config())]

    /// A valid body decodes to exactly the readings it was built from.
    #[test]
    fn valid_bodies_round_trip((format, readings, body) in valid_body()) {
        let decoded = decode(format, &body, NOW_MS, &DecodeLimits::default());
        prop_assert_eq!(decoded, Ok(readings), "{}", String::from_utf8_lossy(&body));
    }

    /// Arbitrary bytes: never a panic, always a clean outcome.
    #[test]
    fn arbitrary_bytes_are_refused_cleanly(
        format in format_strategy(),
        body in prop::collection::vec(any::<u8>(), 0..512),
    ) {
        check_clean_outcome(format, &body)?;
    }

    /// Valid bodies with a few structure-aware mutations: never a panic, always a clean outcome.
    #[test]
    fn mutated_valid_bodies_are_handled_cleanly(
        (format, _readings, body) in valid_body(),
        mutations in prop::collection::vec(mutation(), 1..6),
        other_format in format_strategy(),
    ) {
        let mut body = body;
        for mutation in &mutations {
            mutation::apply(&mut body, mutation, HOSTILE_TOKENS);
        }
        check_clean_outcome(format, &body)?;
        // A body in one format sent as another is hostile input too.
        check_clean_outcome(other_format, &body)?;
    }

    /// Random JSON trees over the decoders' field names and near-miss values.
    #[test]
    fn random_json_trees_are_handled_cleanly((format, body) in tree_body()) {
        check_clean_outcome(format, &body)?;
    }
}

// ---------------------------------------------------------------------------------------------
// Explicit hostile cases (regressions and limits).
// ---------------------------------------------------------------------------------------------

/// Runs the oracle on one body outside proptest.
#[track_caller]
fn check_explicit(format: BodyFormat, body: &[u8]) {
    if let Err(failure) = check_clean_outcome(format, body) {
        panic!(
            "{format:?} {:?}: {failure}",
            String::from_utf8_lossy(&body[..body.len().min(200)])
        );
    }
}

#[test]
fn deep_nesting_is_a_malformed_body_in_every_format() {
    // serde_json's default recursion limit is 128 (serde_json 1.x `Deserializer`, from its
    // documentation); the decoders refuse nesting deeper than 64 before serde_json recurses.
    for format in FORMATS {
        for body in [
            "[".repeat(100_000),
            "{\"a\":".repeat(100_000),
            format!("{{\"readings\": {}", "[".repeat(100_000)),
            format!("{}{}", "[".repeat(65), "]".repeat(65)),
        ] {
            match decode(format, body.as_bytes(), NOW_MS, &DecodeLimits::default()) {
                Err(DecodeError::Malformed(message)) => {
                    assert!(message.contains("nested deeper than 64"), "{message}")
                }
                other => panic!("{format:?}: {other:?}"),
            }
        }
    }
}

#[test]
fn very_long_strings_are_named_field_errors() {
    // API.md: ids are 1–64 characters; a megabyte-long station id is a 422 naming `station`, and the
    // reason quotes the id, so the answer grows with it: the body limit (8 MiB) bounds both.
    let long = "S".repeat(1 << 20);
    let body = json!({"readings": [{"station": long, "quantity": "q", "value": 1,
        "observed_at": "2026-06-01T07:00:00Z"}]})
    .to_string();
    match decode(
        BodyFormat::Json,
        body.as_bytes(),
        NOW_MS,
        &DecodeLimits::default(),
    ) {
        Err(DecodeError::Invalid(errors)) => {
            assert_eq!(errors.len(), 1);
            assert_eq!((errors[0].index, errors[0].field.as_str()), (0, "station"));
        }
        other => panic!("{other:?}"),
    }
    let senml = json!([{"bn": format!("{long}:"), "n": "q", "v": 1}]).to_string();
    match decode(
        BodyFormat::Senml,
        senml.as_bytes(),
        NOW_MS,
        &DecodeLimits::default(),
    ) {
        Err(DecodeError::Invalid(errors)) => {
            assert_eq!((errors[0].index, errors[0].field.as_str()), (0, "bn"))
        }
        other => panic!("{other:?}"),
    }
    // A long run of digits: a number of 100 000 digits does not fit a 64-bit float (f64::MAX has
    // 309 integer digits, IEEE 754 binary64).
    let digits = format!(
        "{{\"readings\": [{{\"station\": \"S\", \"quantity\": \"q\", \"value\": {}, \"observed_at\": \"2026-06-01T07:00:00Z\"}}]}}",
        "9".repeat(100_000)
    );
    match decode(
        BodyFormat::Json,
        digits.as_bytes(),
        NOW_MS,
        &DecodeLimits::default(),
    ) {
        Err(DecodeError::Invalid(errors)) => {
            assert_eq!((errors[0].index, errors[0].field.as_str()), (0, "value"))
        }
        other => panic!("{other:?}"),
    }
}

#[test]
fn hostile_edge_cases_are_clean() {
    // Hand-picked bodies at the edges of the JSON grammar (RFC 8259) and of SenML (RFC 8428).
    let cases: &[&[u8]] = &[
        b"",
        b"\xEF\xBB\xBF",
        b"\xEF\xBB",
        b"\"",
        b"\"\\",
        b"[\"\\u",
        b"[1e999",
        b"[1e999,",
        b"{\"readings\":[1e999]}",
        b"{1e999:1}",
        b"[{\"bn\":\"\\u0000number out of range:1e999\"}]",
        b"[{\"v\":\"\\u0000number out of range:1e999\"}]",
        b"[{\"bt\":1.7976931348623157e308,\"t\":1.7976931348623157e308,\"n\":\"a:b\",\"v\":1}]",
        b"[{\"bt\":-1.7976931348623157e308,\"n\":\"a:b\",\"v\":1}]",
        b"[{\"bv\":1.7976931348623157e308,\"v\":1.7976931348623157e308,\"n\":\"a:b\"}]",
        b"[{\"bn\":\":\",\"n\":\":\",\"v\":1}]",
        b"[{\"bn\":\"a:\",\"n\":\"\",\"v\":1}]",
        b"[{\"bver\":1e300}]",
        b"[{\"bver\":-0}]",
        b"\n\n\r\n",
        b"\r",
        b"{}\n\xff",
        b"]]]]]]]]]]",
        b"}}}}}{{{{",
    ];
    for body in cases {
        for format in FORMATS {
            check_explicit(format, body);
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Query strings, through the real server.
// ---------------------------------------------------------------------------------------------

/// Query parameter names: the ones the read routes know (API.md) and some they do not.
const PARAM_NAMES: &[&str] = &[
    "quantity",
    "from",
    "to",
    "area",
    "station",
    "review",
    "limit",
    "cursor",
    "revision",
    "days",
    "rule",
    "",
    "%00",
    "%FF",
    "a%20b",
    "limit[]",
    "quantity%3D",
];

/// Values: valid, near-valid and hostile, already percent-encoded where needed.
const PARAM_VALUES: &[&str] = &[
    "",
    "air_temperature",
    "pm2_5",
    "no_such_quantity",
    "2026-06-01T07:00:00Z",
    "2026-06-01T09:00:00+02:00",
    "2026-06-01T09:00:00%2B02:00",
    "2026-06-01T09:00:00 02:00",
    "2026-06-01T09:00:00%2002:00",
    "+275760-09-13T00:00:00Z",
    "2026-02-30T07:00:00Z",
    "1",
    "0",
    "-1",
    "1000",
    "1001",
    "9223372036854775807",
    "9223372036854775808",
    "-9223372036854775808",
    "1e3",
    "0x10",
    "pending",
    "upheld",
    "overturned",
    "%FF%FE",
    "%C3%28",
    "%E2%82",
    "%",
    "%%",
    "%2",
    "%00",
    "+",
    "++",
    "=",
    "&",
    "%26",
    "%3D",
    "eyJ9",
    "not-a-cursor",
    // SQL text in a value must stay a value (the store binds every parameter).
    "x%27%20OR%20%271%27%3D%271",
    "%27%3B%20DROP%20TABLE%20readings%3B--",
    "ST-1%27--",
];

/// Paths of the read routes that take a query string (API.md), with an area, station and time that
/// exist or not.
const QUERY_PATHS: &[&str] = &[
    "/v1/areas/velloran-basin/series",
    "/v1/areas/velloran-basin/latest",
    "/v1/areas/no-such-area/series",
    "/v1/areas/velloran-basin/intervals/2026-06-01T07:00:00Z",
    "/v1/areas/velloran-basin/intervals/not-a-time",
    "/v1/set-aside",
    "/v1/audit",
    "/v1/stations/ST-1/health",
    "/v1/stations/ST-1/values",
];

/// Route templates with one path segment to fill in (`{}`), for hostile path segments.
const SEGMENT_PATHS: &[&str] = &[
    "/v1/areas/{}/series",
    "/v1/areas/{}/latest",
    "/v1/areas/velloran-basin/intervals/{}",
    "/v1/stations/{}/health",
    "/v1/stations/{}/values",
];

/// Percent-encodes every byte outside RFC 3986's unreserved set (RFC 3986 §2.3).
fn percent_encode(text: &str) -> String {
    text.bytes()
        .map(|b| {
            if b.is_ascii_alphanumeric() || matches!(b, b'-' | b'.' | b'_' | b'~') {
                (b as char).to_string()
            } else {
                format!("%{b:02X}")
            }
        })
        .collect()
}

/// A path of a read route: a fixed one, or a template with a random segment (any Unicode text,
/// percent-encoded, or raw percent escapes that may not decode to UTF-8 at all).
fn route_path() -> impl Strategy<Value = String> {
    let segment = prop_oneof![
        "\\PC{1,80}".prop_map(|text| percent_encode(&text)),
        "(%[0-9A-Fa-f]{2}){1,10}",
        (1..=300usize).prop_map(|n| "S".repeat(n)),
        prop::sample::select(PARAM_VALUES.to_vec()).prop_map(str::to_owned),
    ];
    // A segment that reads `.` or `..` once `%2E`/`%2e` is decoded is a dot segment, which the
    // client removes before sending (WHATWG URL Standard, "single-dot path segment" and
    // "double-dot path segment"): `/v1/stations/%2E/health` leaves as `/v1/stations/health`, a
    // different route. Sent as it stands (curl --path-as-is), the server answers it with 422.
    let segment = segment.prop_filter("dot segments are resolved by the client", |segment| {
        !matches!(
            segment.to_ascii_lowercase().replace("%2e", ".").as_str(),
            "." | ".."
        )
    });
    prop_oneof![
        prop::sample::select(QUERY_PATHS.to_vec()).prop_map(str::to_owned),
        (prop::sample::select(SEGMENT_PATHS.to_vec()), segment)
            .prop_map(|(template, segment)| template.replace("{}", &segment)),
    ]
}

fn query_string() -> impl Strategy<Value = String> {
    let pair = prop_oneof![
        // name=value from the vocabularies.
        4 => (
            prop::sample::select(PARAM_NAMES.to_vec()),
            prop::sample::select(PARAM_VALUES.to_vec()),
        )
            .prop_map(|(name, value)| format!("{name}={value}")),
        // A name without `=`.
        1 => prop::sample::select(PARAM_NAMES.to_vec()).prop_map(str::to_owned),
        // Random printable ASCII, as a hand-typed URL may have.
        1 => "[!-~&&[^#]]{0,40}",
        // A very long value. Six of them stay below 65,534 bytes, the longest URI the test's HTTP
        // client can send (the `http` crate's limit): a case drawn with five values of up to
        // 20,000 digits failed in the client ("builder error for url"), never reaching the server.
        1 => (prop::sample::select(PARAM_NAMES.to_vec()), 1000..10_000usize)
            .prop_map(|(name, len)| format!("{name}={}", "9".repeat(len))),
    ];
    prop::collection::vec(pair, 0..6).prop_map(|pairs| pairs.join("&"))
}

#[test]
fn random_query_strings_get_contract_answers() {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let server = runtime.block_on(async {
        let server = TestServer::start(consensor_store::testing::TestDatabase::sqlite(), &[]).await;
        server.network("velloran-basin", &["ST-1"]).await;
        server
    });
    let mut runner = TestRunner::new(ProptestConfig {
        // An HTTP round trip per case: fewer cases than the in-process decoders, same bound.
        cases: cases(600),
        max_shrink_iters: 500,
        source_file: Some(file!()),
        failure_persistence: Some(Box::new(FileFailurePersistence::SourceParallel(
            "proptest-regressions",
        ))),
        ..ProptestConfig::default()
    });
    let strategy = (route_path(), query_string());
    let outcome = runner.run(&strategy, |(path, query)| {
        let url = format!("{}{path}?{query}", server.base);
        let (status, content_type, text) = runtime.block_on(async {
            let response = server
                .client
                .get(&url)
                .bearer_auth(ADMIN)
                .send()
                .await
                .map_err(|error| TestCaseError::fail(format!("{url}: {error}")))?;
            let status = response.status().as_u16();
            let content_type = response
                .headers()
                .get("content-type")
                .and_then(|v| v.to_str().ok())
                .unwrap_or_default()
                .to_owned();
            let text = response
                .text()
                .await
                .map_err(|error| TestCaseError::fail(format!("{url}: {error}")))?;
            Ok::<_, TestCaseError>((status, content_type, text))
        })?;
        prop_assert!(
            matches!(status, 200 | 400 | 404 | 422),
            "{url}: {status} {text}"
        );
        prop_assert!(
            content_type.starts_with("application/json"),
            "{url}: {content_type}"
        );
        let body: Value = serde_json::from_str(&text)
            .map_err(|error| TestCaseError::fail(format!("{url}: {error}: {text}")))?;
        if status != 200 {
            // API.md: every error body is {"error": code, "message": sentence, "details"?}.
            prop_assert!(body["error"].is_string(), "{url}: {body}");
            prop_assert!(
                body["message"].as_str().is_some_and(|m| !m.is_empty()),
                "{url}: {body}"
            );
            if status == 422 {
                if let Some(details) = body.get("details") {
                    prop_assert!(
                        details[0]["field"].is_string(),
                        "a 422 detail names the field: {url}: {body}"
                    );
                }
            }
        }
        Ok(())
    });
    // The network is intact after all that.
    let (status, stations) =
        runtime.block_on(server.call(reqwest::Method::GET, "/v1/stations", Some(ADMIN), None));
    assert_eq!(status, 200, "{stations}");
    assert!(stations.to_string().contains("ST-1"), "{stations}");
    runtime.block_on(server.stop());
    if let Err(failure) = outcome {
        panic!("{failure}");
    }
}
