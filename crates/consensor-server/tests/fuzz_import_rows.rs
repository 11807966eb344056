//! Bounded fuzzing of the CSV row decoder of `consensor import`
//! (`consensor_server::ingest::decode_text_reading`, API.md "Command line": "through the same
//! validation as the HTTP ingest"), in the manner of `fuzz_decoders.rs`:
//! * a row written from a valid reading decodes to exactly that reading (a round trip);
//! * rows of arbitrary text, and valid rows with fields mutated (bytes flipped, inserted, deleted,
//!   truncated, hostile tokens spliced in, whole fields replaced) never panic, and every outcome is
//!   well-formed: a reading that passes the API.md rules and carries the row's own fields, or
//!   field errors that each name one of the five fields and give a reason;
//! * the errors of a row name exactly the fields that are bad on their own: each field is decoded
//!   alone in an otherwise valid row, and the row's errors name the union of those fields;
//! * through the whole import, a CSV file with one bad row among valid ones stops with the file,
//!   the line the bad row starts on (quoted fields may span lines) and the bad field named.
//!
//! Each property runs a fixed number of cases (2000 for the decoder, fewer for the whole import,
//! where a case is a file imported into a real SQLite database), so the file runs in a few seconds
//! of debug build; `CONSENSOR_FUZZ_CASES` raises them for a longer campaign by hand. A failure
//! found by proptest is saved by proptest itself in `fuzz_import_rows.proptest-regressions`
//! beside this file (commit it), as for `fuzz_decoders.rs`.

mod mutation;

use std::collections::BTreeSet;

use consensor_server::config::Config;
use consensor_server::import::{self, ImportOptions};
use consensor_server::ingest::{
    decode_text_reading, DecodeError, DecodeLimits, DecodedReading, TextReading,
};
use mutation::{cases, Mutation};
use proptest::prelude::*;
use proptest::test_runner::{Config as ProptestConfig, FileFailurePersistence, TestRunner};

/// 2026-06-01T07:00:00Z in epoch milliseconds (GNU date 9.1: `date -u -d 2026-06-01T07:00:00Z
/// +%s%3N`).
const NOW_MS: i64 = 1_780_297_200_000;
/// API.md: a time more than 10 minutes in the future is refused.
const MAX_FUTURE_MS: i64 = 10 * 60 * 1000;
/// The five fields of a reading, in the order a row's errors list them.
const FIELDS: [&str; 5] = ["station", "quantity", "value", "unit", "observed_at"];

/// Cases per decoder property: bounded so the whole file stays within seconds in a debug build.
const DECODER_CASES: u32 = 2000;

fn config(default_cases: u32) -> ProptestConfig {
    ProptestConfig {
        cases: cases(default_cases),
        // The shrinker stops after this many steps so a failure is reported in bounded time too.
        max_shrink_iters: 2000,
        source_file: Some(file!()),
        failure_persistence: Some(Box::new(FileFailurePersistence::SourceParallel(
            "proptest-regressions",
        ))),
        ..ProptestConfig::default()
    }
}

// ---------------------------------------------------------------------------------------------
// Rows as owned text.
// ---------------------------------------------------------------------------------------------

/// The five fields of a CSV row; `unit: None` is a file without the (optional) unit column.
#[derive(Debug, Clone, PartialEq)]
struct Row {
    station: String,
    quantity: String,
    observed_at: String,
    value: String,
    unit: Option<String>,
}

impl Row {
    fn fields(&self) -> TextReading<'_> {
        TextReading {
            station: &self.station,
            quantity: &self.quantity,
            observed_at: &self.observed_at,
            value: &self.value,
            unit: self.unit.as_deref(),
        }
    }

    /// The field named `name` (one of [`FIELDS`]); the unit column is added when absent.
    fn field_mut(&mut self, name: &str) -> &mut String {
        match name {
            "station" => &mut self.station,
            "quantity" => &mut self.quantity,
            "observed_at" => &mut self.observed_at,
            "value" => &mut self.value,
            "unit" => self.unit.get_or_insert_with(String::new),
            other => panic!("no field {other}"),
        }
    }

    fn field(&self, name: &str) -> &str {
        match name {
            "station" => &self.station,
            "quantity" => &self.quantity,
            "observed_at" => &self.observed_at,
            "value" => &self.value,
            "unit" => self.unit.as_deref().unwrap_or(""),
            other => panic!("no field {other}"),
        }
    }

    fn decode(&self) -> Result<DecodedReading, DecodeError> {
        decode_text_reading(&self.fields(), NOW_MS, &DecodeLimits::default())
    }
}

// ---------------------------------------------------------------------------------------------
// The oracle.
// ---------------------------------------------------------------------------------------------

/// API.md: ids are 1–64 characters of `[A-Za-z0-9._-]`.
fn is_api_id(id: &str) -> bool {
    (1..=64).contains(&id.len())
        && id
            .bytes()
            .all(|b| b.is_ascii_alphanumeric() || matches!(b, b'.' | b'_' | b'-'))
}

/// Decodes `row` (a panic fails the property) and checks the outcome is well-formed; returns the
/// set of fields its errors name (empty when it decoded).
fn check_row(row: &Row) -> Result<BTreeSet<String>, TestCaseError> {
    match row.decode() {
        Ok(reading) => {
            // A decoded reading obeys API.md's input rules and is the row's own.
            prop_assert!(is_api_id(&reading.station), "station {:?}", reading.station);
            prop_assert!(
                is_api_id(&reading.quantity),
                "quantity {:?}",
                reading.quantity
            );
            prop_assert_eq!(&reading.station, &row.station);
            prop_assert_eq!(&reading.quantity, &row.quantity);
            // API.md "Ingest": an empty value is "no value"; a number must be finite.
            prop_assert_eq!(reading.value.is_none(), row.value.is_empty());
            if let Some(value) = reading.value {
                prop_assert!(value.is_finite(), "value {}", value);
            }
            match (&reading.unit, row.unit.as_deref()) {
                (None, None | Some("")) => {}
                (Some(unit), Some(sent)) => {
                    prop_assert_eq!(unit.as_str(), sent);
                    prop_assert!(
                        unit.len() <= 64 && unit.bytes().all(|b| b.is_ascii_graphic()),
                        "unit {:?}",
                        unit
                    );
                }
                (decoded, sent) => prop_assert!(false, "unit {:?} from {:?}", decoded, sent),
            }
            prop_assert!(
                reading.observed_at_ms <= NOW_MS + MAX_FUTURE_MS,
                "a time more than 10 minutes ahead: {}",
                reading.observed_at_ms
            );
            Ok(BTreeSet::new())
        }
        Err(DecodeError::Invalid(errors)) => {
            prop_assert!(!errors.is_empty(), "an Invalid error listing nothing");
            let mut named = BTreeSet::new();
            for error in &errors {
                // One row: every error has index 0 (the import adds the line).
                prop_assert_eq!(error.index, 0, "{:?}", error);
                prop_assert!(
                    FIELDS.contains(&error.field.as_str()),
                    "an error naming no field of the row: {:?}",
                    error
                );
                prop_assert!(
                    !error.reason.is_empty(),
                    "an error with no reason: {:?}",
                    error
                );
                prop_assert!(
                    named.insert(error.field.clone()),
                    "two errors for one field: {:?}",
                    errors
                );
            }
            // Errors come in the order of FIELDS.
            let positions: Vec<usize> = errors
                .iter()
                .map(|e| FIELDS.iter().position(|f| *f == e.field).unwrap())
                .collect();
            prop_assert!(
                positions.windows(2).all(|pair| pair[0] < pair[1]),
                "errors out of order: {:?}",
                errors
            );
            Ok(named)
        }
        // A row cannot be malformed (the CSV layer has split it) nor empty.
        Err(other) => Err(TestCaseError::fail(format!("a row decoded to {other:?}"))),
    }
}

/// The fields of `row` that are bad on their own: each decoded in `valid` with only that field
/// taken from `row`.
fn bad_alone(valid: &Row, row: &Row) -> Result<BTreeSet<String>, TestCaseError> {
    let mut bad = BTreeSet::new();
    for name in FIELDS {
        let mut alone = valid.clone();
        if name == "unit" {
            alone.unit = row.unit.clone();
        } else {
            *alone.field_mut(name) = row.field(name).to_owned();
        }
        if alone == *valid {
            continue;
        }
        let named = check_row(&alone)?;
        prop_assert!(
            named.iter().all(|field| field == name),
            "changing only {} made errors on {:?}: {:?}",
            name,
            named,
            alone
        );
        bad.extend(named);
    }
    Ok(bad)
}

// ---------------------------------------------------------------------------------------------
// Strategies.
// ---------------------------------------------------------------------------------------------

fn api_id() -> impl Strategy<Value = String> {
    "[A-Za-z0-9._-]{1,64}"
}

fn unit() -> impl Strategy<Value = Option<String>> {
    prop_oneof![
        Just(None),
        Just(Some(String::new())),
        prop::sample::select(vec![
            "Cel", "[degF]", "%", "hPa", "m/s", "km/h", "ug/m3", "W/m2"
        ])
        .prop_map(|unit| Some(unit.to_owned())),
        "[!-~]{1,64}".prop_map(Some),
    ]
}

/// A finite value, or none.
fn value() -> impl Strategy<Value = Option<f64>> {
    prop_oneof![
        1 => Just(None),
        8 => mutation::finite_value().prop_map(Some),
    ]
}

/// RFC 3339 text for `ms`, in one of the forms the ingest accepts: UTC with `Z`, or another
/// offset (RFC 3339 §5.6), with or without fractional seconds.
fn rfc3339(ms: i64, offset_minutes: i32) -> String {
    let offset = chrono::FixedOffset::east_opt(offset_minutes * 60).unwrap();
    chrono::DateTime::from_timestamp_millis(ms)
        .unwrap()
        .with_timezone(&offset)
        .to_rfc3339_opts(chrono::SecondsFormat::Millis, true)
}

/// A valid reading and the row that carries it.
fn valid_row() -> impl Strategy<Value = (DecodedReading, Row)> {
    (
        api_id(),
        api_id(),
        value(),
        unit(),
        // From 1970 up to the future limit, to the millisecond.
        0..=NOW_MS + MAX_FUTURE_MS,
        -(14 * 60)..=(14 * 60),
    )
        .prop_map(|(station, quantity, value, unit, observed_at_ms, offset)| {
            let row = Row {
                station: station.clone(),
                quantity: quantity.clone(),
                observed_at: rfc3339(observed_at_ms, offset),
                // serde_json writes a float in shortest round-trip form, a JSON number.
                value: value.map_or_else(String::new, |v| serde_json::json!(v).to_string()),
                unit: unit.clone(),
            };
            let reading = DecodedReading {
                station,
                quantity,
                value,
                unit: unit.filter(|u| !u.is_empty()),
                observed_at_ms,
            };
            (reading, row)
        })
}

/// Text that tends to break number, time, id and unit handling.
const HOSTILE_TOKENS: &[&str] = &[
    "1e999",
    "-1e999",
    "1E+400",
    "1.7976931348623158e308",
    "-0",
    "01",
    "1.",
    ".5",
    "1e",
    "+1",
    "NaN",
    "inf",
    "-Infinity",
    "0x10",
    "13,9",
    "1 ",
    " 1",
    "1_000",
    "null",
    "true",
    "\"1\"",
    "[1]",
    "{}",
    "\u{0}",
    "\u{feff}",
    "\u{1F321}",
    "é",
    "\r\n",
    "\"",
    ",",
    "deg C",
    "2026-06-01 07:00",
    "2026-06-01T07:00:00",
    "2026-06-01T07:10:01Z",
    "2026-02-30T00:00:00Z",
    "9999-12-31T23:59:60Z",
    "+275760-09-13T00:00:00Z",
    "0000-01-01T00:00:00+23:59",
    "2026-06-01T07:00:00.123456789123Z",
    "2026-06-01t07:00:00z",
];

/// A field's mutation: the shared byte mutations (CSV's quoting, separators and line ends and the
/// fields' number and time characters drawn more often), or the whole field replaced by a hostile
/// token, repeated, or emptied.
#[derive(Debug, Clone)]
enum FieldMutation {
    Bytes(Mutation),
    Replace { token: usize },
    Repeat { times: usize },
    Empty,
}

fn mutation() -> impl Strategy<Value = FieldMutation> {
    prop_oneof![
        4 => mutation::mutation(b"0123456789eE+-.:TZtz ,\"\r\n_[]/%", HOSTILE_TOKENS.len(), 8)
            .prop_map(FieldMutation::Bytes),
        1 => (0..HOSTILE_TOKENS.len()).prop_map(|token| FieldMutation::Replace { token }),
        1 => (2..100usize).prop_map(|times| FieldMutation::Repeat { times }),
        1 => Just(FieldMutation::Empty),
    ]
}

fn apply(text: &str, mutation: &FieldMutation) -> String {
    let mut bytes = text.as_bytes().to_vec();
    match mutation {
        FieldMutation::Bytes(mutation) => mutation::apply(&mut bytes, mutation, HOSTILE_TOKENS),
        FieldMutation::Replace { token } => bytes = HOSTILE_TOKENS[*token].as_bytes().to_vec(),
        FieldMutation::Repeat { times } => bytes = bytes.repeat(*times),
        FieldMutation::Empty => bytes.clear(),
    }
    String::from_utf8_lossy(&bytes).into_owned()
}

/// A valid row with some of its fields mutated, and the row it came from.
fn mutated_row() -> impl Strategy<Value = (Row, Row)> {
    (
        valid_row(),
        prop::collection::vec((prop::sample::select(FIELDS.to_vec()), mutation()), 1..4),
    )
        .prop_map(|((_, valid), mutations)| {
            let mut row = valid.clone();
            for (field, mutation) in &mutations {
                let text = row.field(field).to_owned();
                *row.field_mut(field) = apply(&text, mutation);
            }
            (valid, row)
        })
}

/// Any text in each field, unit column present or not.
fn arbitrary_row() -> impl Strategy<Value = Row> {
    let text = prop_oneof![
        "\\PC{0,80}",
        ".{0,80}",
        prop::sample::select(HOSTILE_TOKENS.to_vec()).prop_map(str::to_owned),
    ];
    (
        text.clone(),
        text.clone(),
        text.clone(),
        text.clone(),
        prop::option::of(text),
    )
        .prop_map(|(station, quantity, observed_at, value, unit)| Row {
            station,
            quantity,
            observed_at,
            value,
            unit,
        })
}

proptest! {
    #![proptest_config(config(DECODER_CASES))]

    /// A row written from a valid reading decodes to exactly that reading.
    #[test]
    fn valid_rows_round_trip((reading, row) in valid_row()) {
        prop_assert_eq!(row.decode(), Ok(reading), "{:?}", row);
    }

    /// Arbitrary text in every field: never a panic, always a clean outcome.
    #[test]
    fn arbitrary_rows_are_refused_cleanly(row in arbitrary_row()) {
        check_row(&row)?;
    }

    /// Mutated valid rows: never a panic, a clean outcome, and the errors name exactly the fields
    /// that are bad on their own.
    #[test]
    fn mutated_rows_name_every_bad_field((valid, row) in mutated_row()) {
        let named = check_row(&row)?;
        let expected = bad_alone(&valid, &row)?;
        prop_assert_eq!(named, expected, "{:?}", row);
    }
}

// ---------------------------------------------------------------------------------------------
// The whole import: the bad row's line and field are named.
// ---------------------------------------------------------------------------------------------

/// Valid rows before and after one bad row, and which field of it is bad.
fn file_with_one_bad_row() -> impl Strategy<Value = (Vec<Row>, usize, &'static str, Row)> {
    let invalid_field = prop::sample::select(vec![
        ("station", "ST 1"),
        ("station", ""),
        ("quantity", "air temperature"),
        ("value", "NaN"),
        ("value", "1e999"),
        ("value", "13,9"),
        ("value", "1\n2"),
        ("unit", "deg C"),
        ("observed_at", "2026-06-01 07:00"),
        ("observed_at", "2026-06-01T07:00:00"),
    ]);
    (
        prop::collection::vec(valid_row(), 1..12),
        any::<usize>(),
        invalid_field,
    )
        .prop_map(|(rows, at, (field, text))| {
            let mut rows: Vec<Row> = rows
                .into_iter()
                .map(|(_, mut row)| {
                    // Every row in one file has the unit column.
                    row.unit.get_or_insert_with(String::new);
                    row
                })
                .collect();
            let bad_index = at % rows.len();
            let mut bad = rows[bad_index].clone();
            *bad.field_mut(field) = text.to_owned();
            rows[bad_index] = bad.clone();
            (rows, bad_index, field, bad)
        })
}

#[test]
fn an_import_names_the_line_and_field_of_a_bad_row() {
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    // One real SQLite database for every case: a bad row stops the import before its batch
    // commits (the files are far smaller than a batch), so nothing but the network is stored.
    let directory = tempfile::tempdir().unwrap();
    let database_url = format!("sqlite://{}", directory.path().join("import.db").display());
    let stations_path = directory.path().join("stations.csv");
    std::fs::write(
        &stations_path,
        "station,area,name\nST-1,velloran-basin,Mast 1\n",
    )
    .unwrap();
    let readings_path = directory.path().join("readings.csv");
    let mut runner = TestRunner::new(config(64));
    let outcome = runner.run(&file_with_one_bad_row(), |(rows, bad_index, field, bad)| {
        // The file as a CSV writer writes it: fields with commas, quotes or line breaks quoted.
        // The line each record starts on is counted from the bytes written before it.
        let mut writer = csv::Writer::from_writer(Vec::new());
        writer
            .write_record(["station", "quantity", "observed_at", "value", "unit"])
            .unwrap();
        let mut bad_line = 0u64;
        for (index, row) in rows.iter().enumerate() {
            writer.flush().unwrap();
            if index == bad_index {
                let before = writer.get_ref();
                bad_line = 1 + before.iter().filter(|b| **b == b'\n').count() as u64;
            }
            writer
                .write_record([
                    &row.station,
                    &row.quantity,
                    &row.observed_at,
                    &row.value,
                    row.unit.as_deref().unwrap_or(""),
                ])
                .unwrap();
        }
        std::fs::write(&readings_path, writer.into_inner().unwrap()).unwrap();
        let args: Vec<String> = [
            "--station-file",
            stations_path.to_str().unwrap(),
            "--area-interval",
            "10m",
            "--format",
            "csv",
            readings_path.to_str().unwrap(),
        ]
        .iter()
        .map(|s| (*s).to_owned())
        .collect();
        let (options, _) = ImportOptions::parse(&args).expect("options");
        let config = Config::load(
            None,
            vec![("CONSENSOR_DATABASE_URL".to_owned(), database_url.clone())],
            &[],
        )
        .expect("configuration");
        let result = runtime.block_on(import::run(options, config));
        let message = match result {
            Ok(summary) => {
                return Err(TestCaseError::fail(format!(
                    "imported {summary:?} despite the bad row {bad:?}"
                )))
            }
            Err(error) => format!("{error:#}"),
        };
        // `FILE:LINE: field F: reason` (import.rs), then what was stored before it.
        let expected = format!("{}:{bad_line}: field {field}: ", readings_path.display());
        prop_assert!(
            message.starts_with(&expected),
            "expected {expected:?} in {message:?} for {bad:?}"
        );
        prop_assert!(
            message.contains("the import stopped before any reading was stored"),
            "{message}"
        );
        Ok(())
    });
    if let Err(failure) = outcome {
        panic!("{failure}");
    }
}
