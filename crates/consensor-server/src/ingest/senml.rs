//! SenML packs (RFC 8428, JSON representation, `application/senml+json`).
//!
//! A pack is an array of records. Base fields (`bn`, `bt`, `bu`, `bv`, `bs`, `bver`) apply to the
//! record that holds them and to every later record until another record sets the same field again
//! (RFC 8428 §4); regular fields (`n`, `u`, `v`, `vs`, `vb`, `vd`, `s`, `t`, `ut`) apply to their own
//! record only. Each record is resolved (RFC 8428 §4.6) and then mapped onto a reading:
//!
//! - **Name.** The resolved name `bn + n` must use the characters RFC 8428 §4.5.1 allows. API.md
//!   puts the station in the base name (`"ST-014:"` or `"urn:dev:...:ST-014:"`) and the quantity in
//!   `n`, so the resolved name is split at its *last* `:`: what follows is the quantity, and the last
//!   `:`-separated segment of what precedes is the station. `urn:dev:ow:ST-014:air_temperature`
//!   gives station `ST-014` and quantity `air_temperature`. A name with no `:` cannot name both and
//!   is refused.
//! - **Value.** `bv + v` (RFC 8428 §4.5.4; a missing one of the two counts as zero, so a record with
//!   only a base value in force reads the base value). A reading must be numeric: a record with
//!   `vs`, `vb` or `vd` is refused, and so is one with no numeric value at all (only a sum `s`, or
//!   nothing). SenML has no "no value" marker, so a decoded SenML value is never `None`.
//! - **Unit.** `u`, or else `bu`, or else none (the canonical unit is then assumed, as API.md says of
//!   a missing unit).
//! - **Time.** `bt + t` in seconds (a missing one counts as zero, RFC 8428 §4.5.3). A sum below 2^28
//!   is relative to "now" — the server clock `now_ms` at decoding — and anything from 2^28 up is
//!   seconds since the Unix epoch.
//! - **Header records.** A record holding only base fields carries no measurement; it only sets base
//!   values for the records after it. RFC 8428's own example in §5.1.7 starts a pack with
//!   `{"bn": "urn:dev:ow:10e2073a01080063:"}`, so such a record is accepted and yields no reading.
//!   Its index still counts: error indices are record indices.
//! - **Version.** `bver` defaults to 10 (RFC 8428 §4.1). A version above 10 describes a format this
//!   decoder does not know, which RFC 8428 §4.4 says must not be used: refused. Versions 1–10 are
//!   accepted (RFC 8428's own §5.1.2 example declares version 5), and every record of a pack must
//!   have the same version (§4.4).
//! - **Other fields.** A field this decoder does not know is ignored, as RFC 8428 §4.4 requires,
//!   unless its label ends with `_`, which marks a field that must be understood: refused. `ut`
//!   (update time) and the sums `s`/`bs` are understood but have no place in a reading; their types
//!   are still checked.

use super::json_text::{self, Name, Node};
use super::{check_unit, Context, DecodeError, DecodedReading, FieldError};

/// RFC 8428 §4.5.3: times below 2^28 seconds are relative to now.
const RELATIVE_TIME_LIMIT_SECONDS: f64 = 268_435_456.0;
/// RFC 8428 §4.1: the version this document defines, and the default.
const SENML_VERSION: f64 = 10.0;

/// Decodes a SenML pack. Errors are indexed by record.
pub(super) fn decode_pack(
    body: &[u8],
    context: &Context<'_>,
    errors: &mut Vec<FieldError>,
) -> Result<Vec<(usize, DecodedReading)>, DecodeError> {
    let node = json_text::parse(body)
        .map_err(|error| DecodeError::Malformed(format!("SenML JSON, {error}")))?;
    let Node::Array(records) = node else {
        errors.push(FieldError {
            index: 0,
            field: "pack".into(),
            reason: format!(
                "a SenML pack is a JSON array of records (RFC 8428 §5), not {}",
                node.kind()
            ),
        });
        return Ok(Vec::new());
    };
    let mut base = BaseValues::default();
    let mut readings = Vec::new();
    for (index, record) in records.into_iter().enumerate() {
        let mut record_errors = RecordErrors {
            index,
            errors,
            found: false,
        };
        let reading = resolve_record(record, &mut base, context, &mut record_errors);
        if let Some(reading) = reading {
            if readings.len() == context.limits.max_readings {
                return Err(context.too_many_readings(index, "record"));
            }
            readings.push((index, reading));
        }
    }
    Ok(readings)
}

/// The base values in force, carried from record to record.
struct BaseValues {
    name: String,
    time: f64,
    unit: Option<String>,
    value: Option<f64>,
    version: f64,
}

impl Default for BaseValues {
    fn default() -> Self {
        BaseValues {
            name: String::new(),
            time: 0.0,
            unit: None,
            value: None,
            version: SENML_VERSION,
        }
    }
}

/// Collects the errors of one record.
struct RecordErrors<'a> {
    index: usize,
    errors: &'a mut Vec<FieldError>,
    found: bool,
}

impl RecordErrors<'_> {
    fn fail(&mut self, field: &str, reason: impl Into<String>) {
        self.found = true;
        self.errors.push(FieldError {
            index: self.index,
            field: field.to_owned(),
            reason: reason.into(),
        });
    }
}

/// The fields of one record, type-checked.
#[derive(Default)]
struct RecordFields {
    base_name: Option<String>,
    base_time: Option<f64>,
    base_unit: Option<String>,
    base_value: Option<f64>,
    base_version: Option<f64>,
    name: Option<String>,
    unit: Option<String>,
    value: Option<f64>,
    time: Option<f64>,
    /// Whether any regular field is present: a record without one is a header.
    has_regular_field: bool,
    /// Which non-numeric value field is present, if any (`vs`, `vb`, `vd`).
    non_numeric_value: Option<&'static str>,
    has_sum: bool,
    /// The labels present, whatever their type, so a field of the wrong type is not also reported
    /// as missing.
    present: Vec<&'static str>,
}

/// The labels of RFC 8428 Table 2 (JSON), with the JSON type each must have.
#[derive(Clone, Copy, PartialEq)]
pub(super) enum Expect {
    String,
    Number,
    Boolean,
}

pub(super) const LABELS: [(&str, Expect, bool); 15] = [
    // (label, JSON type, is a base field)
    ("bn", Expect::String, true),
    ("bt", Expect::Number, true),
    ("bu", Expect::String, true),
    ("bv", Expect::Number, true),
    ("bs", Expect::Number, true),
    ("bver", Expect::Number, true),
    ("n", Expect::String, false),
    ("u", Expect::String, false),
    ("v", Expect::Number, false),
    ("vs", Expect::String, false),
    ("vb", Expect::Boolean, false),
    ("vd", Expect::String, false),
    ("s", Expect::Number, false),
    ("t", Expect::Number, false),
    ("ut", Expect::Number, false),
];

fn read_fields(members: Vec<(Name, Node)>, errors: &mut RecordErrors<'_>) -> RecordFields {
    let mut fields = RecordFields::default();
    for (label, value) in members {
        let Some(&(known, expect, is_base)) = LABELS.iter().find(|(l, _, _)| *l == label) else {
            if label.ends_with('_') {
                errors.fail(
                    &label,
                    "a field whose label ends with '_' must be understood, and this one is not \
                     (RFC 8428 §4.4)",
                );
            }
            // RFC 8428 §4.4: any other unknown field MUST be ignored.
            continue;
        };
        if fields.present.contains(&known) {
            errors.fail(known, "appears more than once in the record");
            continue;
        }
        fields.present.push(known);
        if !is_base {
            fields.has_regular_field = true;
        }
        let wrong_type = |kind: &str| {
            let wanted = match expect {
                Expect::String => "a string",
                Expect::Number => "a number",
                Expect::Boolean => "a boolean",
            };
            format!("must be {wanted} (RFC 8428 Table 2), not {kind}")
        };
        match (expect, value) {
            (Expect::Number, Node::Number(number)) => match known {
                "bt" => fields.base_time = Some(number),
                "bv" => fields.base_value = Some(number),
                "bver" => fields.base_version = Some(number),
                "v" => fields.value = Some(number),
                "t" => fields.time = Some(number),
                "s" => fields.has_sum = true,
                // `bs` and `ut` have no place in a reading; only their type matters.
                _ => {}
            },
            (Expect::Number, Node::OutOfRange(token)) => errors.fail(
                known,
                format!("the number {token} is out of range for a 64-bit float"),
            ),
            (Expect::String, Node::String(text)) => match known {
                "bn" => fields.base_name = Some(text),
                "bu" => fields.base_unit = Some(text),
                "n" => fields.name = Some(text),
                "u" => fields.unit = Some(text),
                // `vs`, `vd`
                _ => fields.non_numeric_value = Some(known),
            },
            (Expect::Boolean, Node::Bool(_)) => fields.non_numeric_value = Some(known),
            (_, other) => errors.fail(known, wrong_type(other.kind())),
        }
    }
    fields
}

/// Applies a record's base fields, then resolves it into a reading if it carries one and has no
/// error.
fn resolve_record(
    record: Node,
    base: &mut BaseValues,
    context: &Context<'_>,
    errors: &mut RecordErrors<'_>,
) -> Option<DecodedReading> {
    let Node::Object(members) = record else {
        errors.fail(
            "record",
            format!(
                "a SenML record is a JSON object (RFC 8428 §5), not {}",
                record.kind()
            ),
        );
        return None;
    };
    let fields = read_fields(members, errors);

    // Base fields take effect from this record on (RFC 8428 §4), even if the record has errors, so
    // the records after it are judged with the base values their sender meant.
    if let Some(version) = fields.base_version {
        if !(version >= 1.0 && version.fract() == 0.0) {
            errors.fail(
                "bver",
                format!("{version} is not a positive integer (RFC 8428 §4.1)"),
            );
        } else if version > SENML_VERSION {
            errors.fail(
                "bver",
                format!(
                    "SenML version {version} is newer than version 10, the one understood here \
                     (RFC 8428 §4.4)"
                ),
            );
        } else if errors.index > 0 && version != base.version {
            errors.fail(
                "bver",
                format!(
                    "version {version} differs from version {} of the records before it; all \
                     records of a pack must have the same version (RFC 8428 §4.4)",
                    base.version
                ),
            );
        } else {
            base.version = version;
        }
    }
    if let Some(name) = fields.base_name {
        base.name = name;
    }
    if let Some(time) = fields.base_time {
        base.time = time;
    }
    if let Some(unit) = fields.base_unit {
        base.unit = Some(unit);
    }
    if let Some(value) = fields.base_value {
        base.value = Some(value);
    }

    if !fields.has_regular_field {
        // A header record: base values only, no measurement (RFC 8428 §5.1.7 example).
        return None;
    }

    let ids = resolve_name(&base.name, fields.name.as_deref(), context, errors);

    let unit_field = if fields.unit.is_some() { "u" } else { "bu" };
    let unit = fields.unit.or_else(|| base.unit.clone());
    if let Some(unit) = &unit {
        if let Err(reason) = check_unit(unit) {
            errors.fail(unit_field, reason);
        }
    }

    let value = if let Some(label) = fields.non_numeric_value {
        errors.fail(
            label,
            "a reading must be numeric: send the value in \"v\" (RFC 8428 §4.2)",
        );
        None
    } else {
        match (base.value, fields.value) {
            // The field is there but was refused for its type; that error says it all.
            (_, None) if fields.present.contains(&"v") => None,
            (None, None) if fields.has_sum => {
                errors.fail(
                    "v",
                    "the record has only a sum (s) and no value; a reading needs \"v\"",
                );
                None
            }
            (None, None) => {
                errors.fail(
                    "v",
                    "missing; a record must carry a numeric value \"v\" (RFC 8428 §4.2)",
                );
                None
            }
            // RFC 8428 §4.5.4: base value plus value, a missing one counting as zero.
            (base_value, value) => {
                let sum = base_value.unwrap_or(0.0) + value.unwrap_or(0.0);
                if sum.is_finite() {
                    Some(sum)
                } else {
                    errors.fail("v", "bv + v is not a finite 64-bit float");
                    None
                }
            }
        }
    };

    let time_refused = (fields.time.is_none() && fields.present.contains(&"t"))
        || (fields.base_time.is_none() && fields.present.contains(&"bt"));
    let observed_at_ms = if time_refused {
        None
    } else {
        resolve_time(base.time, fields.time, context, errors)
    };

    if errors.found {
        return None;
    }
    let (station, quantity) = ids?;
    Some(DecodedReading {
        station,
        quantity,
        value: Some(value?),
        unit,
        observed_at_ms: observed_at_ms?,
    })
}

/// Resolves `bn + n` into (station, quantity) as the module documentation describes.
fn resolve_name(
    base_name: &str,
    name: Option<&str>,
    context: &Context<'_>,
    errors: &mut RecordErrors<'_>,
) -> Option<(String, String)> {
    let full = format!("{base_name}{}", name.unwrap_or_default());
    if full.is_empty() {
        errors.fail(
            "n",
            "the record has no name: neither bn nor n is given (RFC 8428 §4.2)",
        );
        return None;
    }
    // RFC 8428 §4.5.1: A-Z a-z 0-9 - : . / _ only, starting with a letter or digit.
    let allowed =
        |b: u8| b.is_ascii_alphanumeric() || matches!(b, b'-' | b':' | b'.' | b'/' | b'_');
    if !full.bytes().all(allowed) || !full.as_bytes()[0].is_ascii_alphanumeric() {
        errors.fail(
            "n",
            format!(
                "the name {full:?} (bn + n) must use only A-Z a-z 0-9 - : . / _ and start with a \
                 letter or digit (RFC 8428 §4.5.1)"
            ),
        );
        return None;
    }
    let Some((prefix, quantity)) = full.rsplit_once(':') else {
        errors.fail(
            "n",
            format!(
                "the name {full:?} (bn + n) has no ':'; write the station in bn and the quantity in \
                 n, e.g. bn \"ST-014:\" and n \"air_temperature\""
            ),
        );
        return None;
    };
    let station = prefix.rsplit(':').next().unwrap_or_default();
    let mut ids_ok = true;
    if let Err(reason) = context.check_id(quantity) {
        errors.fail(
            "n",
            format!("the quantity after the last ':' of {full:?}: {reason}"),
        );
        ids_ok = false;
    }
    if let Err(reason) = context.check_id(station) {
        errors.fail(
            "bn",
            format!("the station before the last ':' of {full:?}: {reason}"),
        );
        ids_ok = false;
    }
    ids_ok.then(|| (station.to_owned(), quantity.to_owned()))
}

/// Resolves `bt + t` seconds into epoch milliseconds (RFC 8428 §4.5.3) and applies the future limit.
fn resolve_time(
    base_time: f64,
    time: Option<f64>,
    context: &Context<'_>,
    errors: &mut RecordErrors<'_>,
) -> Option<i64> {
    let field = if time.is_some() { "t" } else { "bt" };
    let seconds = base_time + time.unwrap_or(0.0);
    let relative = seconds < RELATIVE_TIME_LIMIT_SECONDS;
    let milliseconds = if relative {
        context.now_ms as f64 + seconds * 1000.0
    } else {
        seconds * 1000.0
    }
    .round();
    // chrono's range (about ±262 000 years) bounds every time the rest of the program can format.
    let representable = milliseconds.is_finite()
        && milliseconds.abs() < 9.0e18
        && chrono::DateTime::from_timestamp_millis(milliseconds as i64).is_some();
    if !representable {
        errors.fail(
            field,
            format!("bt + t = {seconds} s is not a representable time"),
        );
        return None;
    }
    let milliseconds = milliseconds as i64;
    match context.check_not_in_future(milliseconds) {
        Ok(()) => Some(milliseconds),
        Err(reason) => {
            let meaning = if relative {
                "seconds relative to now, since below 2^28 (RFC 8428 §4.5.3)"
            } else {
                "seconds since the Unix epoch"
            };
            errors.fail(field, format!("bt + t = {seconds} ({meaning}): {reason}"));
            None
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::{decode, BodyFormat, DecodeLimits};
    use super::*;

    /// 2026-06-01T07:00:00Z in epoch milliseconds (GNU date 9.1: `date -u -d 2026-06-01T07:00:00Z
    /// +%s%3N`).
    const NOW_MS: i64 = 1_780_297_200_000;

    fn decode_at(text: &str, now_ms: i64) -> Result<Vec<DecodedReading>, DecodeError> {
        decode(
            BodyFormat::Senml,
            text.as_bytes(),
            now_ms,
            &DecodeLimits::default(),
        )
    }

    fn reading(
        station: &str,
        quantity: &str,
        value: f64,
        unit: Option<&str>,
        observed_at_ms: i64,
    ) -> DecodedReading {
        DecodedReading {
            station: station.into(),
            quantity: quantity.into(),
            value: Some(value),
            unit: unit.map(Into::into),
            observed_at_ms,
        }
    }

    #[track_caller]
    fn check_ok(text: &str, now_ms: i64, expected: &[DecodedReading]) {
        assert_eq!(decode_at(text, now_ms), Ok(expected.to_vec()), "{text}");
    }

    /// Checks that a pack is refused with exactly these `(record index, field)` pairs, each reason
    /// containing its fragment.
    #[track_caller]
    fn check_invalid(text: &str, expected: &[(usize, &str, &str)]) {
        match decode_at(text, NOW_MS) {
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

    #[test]
    fn rfc_8428_multiple_data_points_without_time() {
        // RFC 8428 §5.1.2, first example, verbatim: voltage and current "now". Its base name already
        // has our shape (device id, then ':'), so the device id is the station.
        check_ok(
            r#"[
              {"bn":"urn:dev:ow:10e2073a01080063:","n":"voltage","u":"V","v":120.1},
              {"n":"current","u":"A","v":1.2}
            ]"#,
            NOW_MS,
            &[
                reading("10e2073a01080063", "voltage", 120.1, Some("V"), NOW_MS),
                reading("10e2073a01080063", "current", 1.2, Some("A"), NOW_MS),
            ],
        );
    }

    #[test]
    fn rfc_8428_multiple_data_points_with_base_time() {
        // RFC 8428 §5.1.2, second example, verbatim: current at Tue Jun 8 18:01:16.001 UTC 2010 and
        // each second for the previous 5 seconds; the base unit A applies where no `u` is given, and
        // the pack declares version 5. 2010-06-08T18:01:16.001Z = 1276020076001 ms (GNU date 9.1).
        let base_ms = 1_276_020_076_001;
        let station = "10e2073a0108006";
        check_ok(
            r#"[
              {"bn":"urn:dev:ow:10e2073a0108006:","bt":1.276020076001e+09,
               "bu":"A","bver":5,
               "n":"voltage","u":"V","v":120.1},
              {"n":"current","t":-5,"v":1.2},
              {"n":"current","t":-4,"v":1.3},
              {"n":"current","t":-3,"v":1.4},
              {"n":"current","t":-2,"v":1.5},
              {"n":"current","t":-1,"v":1.6},
              {"n":"current","v":1.7}
            ]"#,
            base_ms,
            &[
                reading(station, "voltage", 120.1, Some("V"), base_ms),
                reading(station, "current", 1.2, Some("A"), base_ms - 5000),
                reading(station, "current", 1.3, Some("A"), base_ms - 4000),
                reading(station, "current", 1.4, Some("A"), base_ms - 3000),
                reading(station, "current", 1.5, Some("A"), base_ms - 2000),
                reading(station, "current", 1.6, Some("A"), base_ms - 1000),
                reading(station, "current", 1.7, Some("A"), base_ms),
            ],
        );
    }

    #[test]
    fn rfc_8428_multiple_measurements_resolve_to_the_published_times() {
        // RFC 8428 §5.1.3, adapted: the humidity records of the example, with the base name changed
        // to our shape (station ST-014, quantity relative_humidity) and the unit `%RH` to UCUM `%`;
        // the base time and the `t` offsets are the example's. The expected times are those of the
        // resolved form the RFC publishes in §5.1.4: 1.320067464e+09, 1.320067524e+09,
        // 1.320067584e+09 and 1.320067644e+09 seconds.
        check_ok(
            r#"[
              {"bn":"urn:dev:ow:ST-014:relative_humidity","bt":1.320067464e+09,
               "bu":"%","v":20},
              {"t":60,"v":20.3},
              {"t":120,"v":20.7},
              {"t":180,"v":21.2}
            ]"#,
            NOW_MS,
            &[
                reading(
                    "ST-014",
                    "relative_humidity",
                    20.0,
                    Some("%"),
                    1_320_067_464_000,
                ),
                reading(
                    "ST-014",
                    "relative_humidity",
                    20.3,
                    Some("%"),
                    1_320_067_524_000,
                ),
                reading(
                    "ST-014",
                    "relative_humidity",
                    20.7,
                    Some("%"),
                    1_320_067_584_000,
                ),
                reading(
                    "ST-014",
                    "relative_humidity",
                    21.2,
                    Some("%"),
                    1_320_067_644_000,
                ),
            ],
        );
    }

    #[test]
    fn rfc_8428_single_data_point() {
        // RFC 8428 §5.1.1, verbatim: the name has no ':' after the device id, so by our rule (split at
        // the last ':') the device id is taken as the quantity and "ow" as the station; the HTTP
        // layer then refuses the unknown quantity. This documents the rule's literal consequence.
        check_ok(
            r#"[{"n":"urn:dev:ow:10e2073a01080063","u":"Cel","v":23.1}]"#,
            NOW_MS,
            &[reading("ow", "10e2073a01080063", 23.1, Some("Cel"), NOW_MS)],
        );
        // The same record adapted to API.md's naming: "urn:dev:...:ST-014:" then the quantity. No
        // time means "roughly now" (RFC 8428 §4.5.3: a time of zero).
        check_ok(
            r#"[{"n":"urn:dev:ow:ST-014:air_temperature","u":"Cel","v":23.1}]"#,
            NOW_MS,
            &[reading(
                "ST-014",
                "air_temperature",
                23.1,
                Some("Cel"),
                NOW_MS,
            )],
        );
        // API.md's short form: bn "ST-014:".
        check_ok(
            r#"[{"bn":"ST-014:","n":"air_temperature","v":13.9}]"#,
            NOW_MS,
            &[reading("ST-014", "air_temperature", 13.9, None, NOW_MS)],
        );
    }

    #[test]
    fn rfc_8428_non_numeric_values_are_refused() {
        // RFC 8428 §5.1.5 (multiple data types), with the base name adapted to ST-014: the string,
        // boolean and data values cannot be readings.
        check_invalid(
            r#"[
              {"bn":"ST-014:","n":"temp","u":"Cel","v":23.1},
              {"n":"label","vs":"Machine Room"},
              {"n":"open","vb":false},
              {"n":"nfv-reader","vd":"aGkgCg"}
            ]"#,
            &[
                (1, "vs", "must be numeric"),
                (2, "vb", "must be numeric"),
                (3, "vd", "must be numeric"),
            ],
        );
    }

    #[test]
    fn rfc_8428_collection_of_resources() {
        // RFC 8428 §5.1.6, adapted: base names "2001:db8::2/" and "2001:db8::1/" become "ST-002:"
        // and "ST-001:"; as the RFC notes, the last record uses the base name of the third record but
        // the base time of the first. 1.320078429e+09 s = 1320078429000 ms.
        let time = 1_320_078_429_000;
        check_ok(
            r#"[
              {"bn":"ST-002:","bt":1.320078429e+09,
               "n":"temperature","u":"Cel","v":25.2},
              {"n":"humidity","u":"%RH","v":30},
              {"bn":"ST-001:","n":"temperature","u":"Cel","v":12.3},
              {"n":"humidity","u":"%RH","v":67}
            ]"#,
            NOW_MS,
            &[
                reading("ST-002", "temperature", 25.2, Some("Cel"), time),
                reading("ST-002", "humidity", 30.0, Some("%RH"), time),
                reading("ST-001", "temperature", 12.3, Some("Cel"), time),
                reading("ST-001", "humidity", 67.0, Some("%RH"), time),
            ],
        );
        // The verbatim names split at their last ':' into "2001:db8:" and "2/temperature", which is
        // not a valid quantity id ('/' is not in API.md's id alphabet).
        check_invalid(
            r#"[{"bn":"2001:db8::2/","bt":1.320078429e+09,"n":"temperature","u":"Cel","v":25.2}]"#,
            &[
                (0, "n", "\"2/temperature\" is not a valid id"),
                (0, "bn", "\"\" is not a valid id"),
            ],
        );
    }

    #[test]
    fn rfc_8428_header_records_carry_no_reading() {
        // RFC 8428 §5.1.7, first example, verbatim: a first record with only a base name.
        check_ok(
            r#"[
              {"bn":"urn:dev:ow:10e2073a01080063:"},
              {"n":"temp","u":"Cel","v":23.1},
              {"n":"heat","u":"/","v":1},
              {"n":"fan","u":"/","v":0}
            ]"#,
            NOW_MS,
            &[
                reading("10e2073a01080063", "temp", 23.1, Some("Cel"), NOW_MS),
                reading("10e2073a01080063", "heat", 1.0, Some("/"), NOW_MS),
                reading("10e2073a01080063", "fan", 0.0, Some("/"), NOW_MS),
            ],
        );
        // A pack of headers alone holds no reading.
        assert_eq!(
            decode_at(r#"[{"bn":"ST-1:"},{"bt":1.5e9}]"#, NOW_MS),
            Err(DecodeError::Empty)
        );
        assert_eq!(decode_at("[]", NOW_MS), Err(DecodeError::Empty));
    }

    #[test]
    fn times_below_two_to_the_28_are_relative_to_now() {
        // RFC 8428 §4.5.3: values below 2**28 are relative to the current time; negative values are
        // seconds in the past.
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","t":-60,"v":1},{"n":"q","t":-0.5,"v":2},{"n":"q","t":0,"v":3}]"#,
            NOW_MS,
            &[
                reading("ST-1", "q", 1.0, None, NOW_MS - 60_000),
                reading("ST-1", "q", 2.0, None, NOW_MS - 500),
                reading("ST-1", "q", 3.0, None, NOW_MS),
            ],
        );
        // Positive relative times are in the future; API.md allows at most 10 minutes ahead.
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","t":600,"v":1}]"#,
            NOW_MS,
            &[reading("ST-1", "q", 1.0, None, NOW_MS + 600_000)],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","n":"q","t":600.001,"v":1}]"#,
            &[(0, "t", "600.001 s ahead")],
        );
        // 2**28 − 1 is still relative (about 8.5 years ahead, so refused); 2**28 itself is the
        // smallest absolute time, 1978-07-04 21:24:16 UTC (RFC 8428 §4.5.3) = 268435456000 ms.
        check_invalid(
            r#"[{"bn":"ST-1:","n":"q","bt":268435455,"v":1}]"#,
            &[(0, "bt", "relative to now")],
        );
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","bt":268435456,"v":1}]"#,
            NOW_MS,
            &[reading("ST-1", "q", 1.0, None, 268_435_456_000)],
        );
        // The sum bt + t decides, not each part (RFC 8428 §4.5.3: "care must be taken to ensure
        // that the sum does not inadvertently reach 2**28").
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","bt":268435000,"t":456,"v":1}]"#,
            NOW_MS,
            &[reading("ST-1", "q", 1.0, None, 268_435_456_000)],
        );
        // Absolute times more than 10 minutes ahead are refused too (API.md).
        check_invalid(
            r#"[{"bn":"ST-1:","n":"q","bt":1780297801,"v":1}]"#,
            &[(0, "bt", "601 s ahead")],
        );
    }

    #[test]
    fn base_values_add_to_values() {
        // RFC 8428 §4.5.4: base value plus value, a missing one counting as zero.
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","bv":10,"v":0.5},{"n":"q","v":-0.5},{"n":"q","t":-1}]"#,
            NOW_MS,
            &[
                reading("ST-1", "q", 10.5, None, NOW_MS),
                reading("ST-1", "q", 9.5, None, NOW_MS),
                reading("ST-1", "q", 10.0, None, NOW_MS - 1000),
            ],
        );
    }

    #[test]
    fn versions() {
        // RFC 8428 §4.1: version 10 is the default; §4.4: a newer version must not be used, and all
        // records of a pack have the same version.
        check_ok(
            r#"[{"bn":"ST-1:","bver":10,"n":"q","v":1}]"#,
            NOW_MS,
            &[reading("ST-1", "q", 1.0, None, NOW_MS)],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","bver":11,"n":"q","v":1}]"#,
            &[(0, "bver", "newer than version 10")],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","bver":0,"n":"q","v":1},{"bver":10.5,"n":"q","v":1},{"bver":"10","n":"q","v":1}]"#,
            &[
                (0, "bver", "not a positive integer"),
                (1, "bver", "not a positive integer"),
                (2, "bver", "must be a number"),
            ],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","n":"q","v":1},{"bver":5,"n":"q","v":1}]"#,
            &[(1, "bver", "same version")],
        );
    }

    #[test]
    fn unknown_fields() {
        // RFC 8428 §4.4: unknown fields MUST be ignored unless the label ends with '_', which MUST
        // be an error.
        check_ok(
            r#"[{"bn":"ST-1:","n":"q","v":1,"colour":"red","bq":[1,{}]}]"#,
            NOW_MS,
            &[reading("ST-1", "q", 1.0, None, NOW_MS)],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","n":"q","v":1,"calibrated_":true}]"#,
            &[(0, "calibrated_", "must be understood")],
        );
    }

    #[test]
    fn names_must_resolve_to_a_station_and_a_quantity() {
        check_invalid(
            r#"[
              {"v":1},
              {"n":"air_temperature","v":1},
              {"bn":"ST-1:","v":1},
              {"bn":"urn:dev:ST 1:","n":"q","v":1},
              {"bn":":","n":"q","v":1},
              {"bn":"x:ST-1:","n":"q","v":1},
              {"bn":"x::","n":"q","v":1}
            ]"#,
            &[
                (0, "n", "no name"),
                (1, "n", "has no ':'"),
                (2, "n", "quantity after the last ':'"),
                // RFC 8428 §4.5.1: no spaces; a name starts with a letter or digit.
                (3, "n", "RFC 8428 §4.5.1"),
                (4, "n", "RFC 8428 §4.5.1"),
                // Record 5 is fine: station ST-1, quantity q (the 'x' segment is ignored).
                (6, "bn", "station before the last ':'"),
            ],
        );
    }

    #[test]
    fn values_and_fields_of_the_wrong_kind() {
        check_invalid(
            r#"[
              {"bn":"ST-1:","n":"q","s":5},
              {"n":"q"},
              {"n":"q","v":1e999},
              {"n":"q","v":1,"t":-1e999},
              {"n":"q","v":"1"},
              {"n":"q","v":null},
              {"n":"q","v":1,"u":3},
              {"n":"q","v":1,"u":""},
              {"n":"q","v":1,"v":2},
              {"n":"q","v":1,"ut":"soon"},
              "record"
            ]"#,
            &[
                (0, "v", "only a sum"),
                (1, "v", "missing"),
                (2, "v", "1e999 is out of range"),
                (3, "t", "-1e999 is out of range"),
                (4, "v", "must be a number"),
                (5, "v", "not null"),
                (6, "u", "must be a string"),
                (7, "u", "must not be empty"),
                (8, "v", "more than once"),
                (9, "ut", "must be a number"),
                (10, "record", "not a string"),
            ],
        );
        check_invalid(
            r#"{"bn":"ST-1:","n":"q","v":1}"#,
            &[(0, "pack", "JSON array of records")],
        );
        check_invalid(
            r#"[{"bn":"ST-1:","bu":"deg C","n":"q","v":1}]"#,
            &[(0, "bu", "not a unit code")],
        );
    }

    #[test]
    fn malformed_packs_and_the_batch_size() {
        assert!(matches!(
            decode_at(r#"[{"n":"a:b","v":1},]"#, NOW_MS),
            Err(DecodeError::Malformed(message)) if message.contains("line 1, column 20")
        ));
        let limits = DecodeLimits {
            max_readings: 2,
            ..DecodeLimits::default()
        };
        // Header records do not count towards the limit; the third reading is record 3.
        let pack = r#"[{"bn":"ST-1:"},{"n":"q","v":1},{"n":"q","v":2},{"n":"q","v":3}]"#;
        let refused = decode(BodyFormat::Senml, pack.as_bytes(), NOW_MS, &limits);
        assert!(
            matches!(&refused, Err(DecodeError::Invalid(errors))
                if errors.len() == 1 && errors[0].index == 3 && errors[0].field == "record"),
            "{refused:?}"
        );
    }
}
