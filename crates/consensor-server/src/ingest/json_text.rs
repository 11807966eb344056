//! Parsing one JSON text into a small tree that keeps what the ingest rules need and serde_json's
//! `Value` loses: the order of an object's members, repeated member names, and numbers too large
//! for an `f64`.
//!
//! serde_json (default features) refuses a number such as `1e999` with a *syntax* error, "number out
//! of range", and stops. API.md wants that reading refused with a 422 that names it, not the whole
//! body with a 400, so before serde_json sees the text a pre-scan finds every number token in a
//! value position that serde_json would refuse and replaces it with a marker string that carries the
//! original token. The tree then shows [`Node::OutOfRange`] where the number was. The pre-scan asks
//! serde_json itself whether a token is out of range, so the two always agree, even on borderline
//! tokens such as `1.7976931348623158e308`, which serde_json's fast float parser refuses although a
//! correctly rounding parser would give `f64::MAX`.
//!
//! The pre-scan also refuses nesting deeper than [`MAX_NESTING`], so a body of a million `[` is a
//! clean "malformed" answer found in one pass, never a deep recursion.

use std::borrow::Cow;
use std::fmt;

use serde::de::{Deserialize, DeserializeSeed, Deserializer, MapAccess, SeqAccess, Visitor};

/// The deepest nesting of arrays and objects accepted. A reading body needs three levels (the top
/// object, the `readings` array, a reading); 64 leaves room for extensions and stays well under
/// serde_json's own recursion limit of 128, so the pre-scan always answers first.
pub(crate) const MAX_NESTING: usize = 64;

/// A parsed JSON value.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Node {
    Null,
    Bool(bool),
    /// A number; always finite, since JSON has no NaN or infinity and overflows become `OutOfRange`.
    Number(f64),
    /// A number token that does not fit an `f64`, as it was written (e.g. `1e999`).
    OutOfRange(String),
    String(String),
    Array(Vec<Node>),
    /// An object's members in the order they were written, repeated names included.
    Object(Vec<(Name, Node)>),
}

/// A member name: the names the ingest formats know are not copied (a batch of thousands of
/// readings has five per reading), any other name is.
pub(crate) type Name = Cow<'static, str>;

/// `name` as static text when it is a member name of the reading formats: the JSON envelope's
/// `readings`, a reading's fields (`readings.rs`) or a SenML label (`senml.rs`).
fn member_name(name: &str) -> Option<&'static str> {
    std::iter::once("readings")
        .chain(super::readings::READING_FIELDS)
        .chain(super::senml::LABELS.iter().map(|(label, _, _)| *label))
        .find(|known| *known == name)
}

/// Reads a member name into a [`Name`].
struct NameSeed;

impl<'de> DeserializeSeed<'de> for NameSeed {
    type Value = Name;

    fn deserialize<D: Deserializer<'de>>(self, deserializer: D) -> Result<Name, D::Error> {
        deserializer.deserialize_str(self)
    }
}

impl Visitor<'_> for NameSeed {
    type Value = Name;

    fn expecting(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        formatter.write_str("a member name")
    }

    fn visit_str<E>(self, name: &str) -> Result<Name, E> {
        Ok(member_name(name).map_or_else(|| Cow::Owned(name.to_owned()), Cow::Borrowed))
    }

    fn visit_string<E>(self, name: String) -> Result<Name, E> {
        Ok(member_name(&name).map_or(Cow::Owned(name), Cow::Borrowed))
    }
}

impl Node {
    /// A short name of the JSON type, for error reasons ("must be a number, not a string").
    pub(crate) fn kind(&self) -> &'static str {
        match self {
            Node::Null => "null",
            Node::Bool(_) => "a boolean",
            Node::Number(_) | Node::OutOfRange(_) => "a number",
            Node::String(_) => "a string",
            Node::Array(_) => "an array",
            Node::Object(_) => "an object",
        }
    }
}

/// Where and why a JSON text is not well-formed, with 1-based line and column (in bytes) of the
/// original text.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct SyntaxError {
    pub line: usize,
    pub column: usize,
    pub what: String,
}

impl fmt::Display for SyntaxError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "line {}, column {}: {}",
            self.line, self.column, self.what
        )
    }
}

/// Parses one complete JSON text (trailing whitespace allowed, nothing else after it).
pub(crate) fn parse(text: &[u8]) -> Result<Node, SyntaxError> {
    let shielded = shield_out_of_range_numbers(text)?;
    match serde_json::from_slice::<Node>(&shielded.text) {
        Ok(node) => Ok(node),
        Err(error) => Err(shielded.locate(text, &error)),
    }
}

/// The prefix of the marker string that replaces an out-of-range number. It starts with U+0000,
/// which a JSON text can only carry escaped, so no ordinary reading field ever starts with it. A
/// sender who escapes it on purpose gets their string reported as an out-of-range number: still a
/// 422 on the same field, only with a stranger reason.
const OUT_OF_RANGE_MARKER: &str = "\u{0}number out of range:";
/// The same marker as it is written into the JSON text.
const OUT_OF_RANGE_MARKER_ESCAPED: &[u8] = b"\\u0000number out of range:";

/// The text serde_json parses, and the replacements made in it to map positions back.
struct ShieldedText<'a> {
    text: Cow<'a, [u8]>,
    /// `(offset in the shielded text where a replacement ends, bytes it added)`, in text order.
    replacements: Vec<(usize, usize)>,
}

impl ShieldedText<'_> {
    /// Turns serde_json's error, positioned in the shielded text, into one positioned in the
    /// original text. Replacements hold no newline, so only columns on the lines that had one move.
    fn locate(&self, original: &[u8], error: &serde_json::Error) -> SyntaxError {
        let what = describe(error);
        if self.replacements.is_empty() {
            return SyntaxError {
                line: error.line().max(1),
                column: error.column(),
                what,
            };
        }
        let shielded_offset = offset_of(&self.text, error.line(), error.column());
        let added: usize = self
            .replacements
            .iter()
            .take_while(|(end, _)| *end <= shielded_offset)
            .map(|(_, added)| added)
            .sum();
        let (line, column) = line_and_column(original, shielded_offset.saturating_sub(added));
        SyntaxError { line, column, what }
    }
}

/// serde_json's message without its " at line L column C" tail, which may refer to the shielded
/// text.
fn describe(error: &serde_json::Error) -> String {
    let message = error.to_string();
    match message.rfind(" at line ") {
        Some(tail) => message[..tail].to_owned(),
        None => message,
    }
}

/// The byte offset of a 1-based (line, column) position as serde_json counts them: the column is
/// the number of bytes read on that line, so the offset is the line's start plus the column.
fn offset_of(text: &[u8], line: usize, column: usize) -> usize {
    let mut line_start = 0;
    for _ in 1..line {
        match text[line_start..].iter().position(|&b| b == b'\n') {
            Some(newline) => line_start += newline + 1,
            None => break,
        }
    }
    (line_start + column).min(text.len())
}

/// The 1-based (line, column) of a byte offset, counted as serde_json counts them.
fn line_and_column(text: &[u8], offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line = 1 + before.iter().filter(|&&b| b == b'\n').count();
    let line_start = before
        .iter()
        .rposition(|&b| b == b'\n')
        .map_or(0, |newline| newline + 1);
    (line, before.len() - line_start)
}

/// One pass over the text: tracks strings and nesting, and replaces every number token in a value
/// position that serde_json would refuse as out of range with a marker string.
///
/// Numbers in a key position (`{1e999: 1}`) are left alone: serde_json refuses them as "key must be
/// a string", and turning them into strings would make a malformed body look well-formed.
fn shield_out_of_range_numbers(text: &[u8]) -> Result<ShieldedText<'_>, SyntaxError> {
    let mut output: Option<Vec<u8>> = None;
    let mut replacements = Vec::new();
    let mut copied_up_to = 0;
    // Open brackets, innermost last: b'{' or b'['.
    let mut open: Vec<u8> = Vec::new();
    // The last significant byte outside strings: tells a key position from a value position.
    let mut previous = 0u8;
    let mut i = 0;
    while i < text.len() {
        let byte = text[i];
        match byte {
            b' ' | b'\t' | b'\n' | b'\r' => i += 1,
            b'"' => {
                i += 1;
                while i < text.len() {
                    match text[i] {
                        b'\\' => i += 2,
                        b'"' => break,
                        _ => i += 1,
                    }
                }
                i += 1;
                previous = b'"';
            }
            b'{' | b'[' => {
                if open.len() == MAX_NESTING {
                    let (line, column) = line_and_column(text, i + 1);
                    return Err(SyntaxError {
                        line,
                        column,
                        what: format!("arrays and objects nested deeper than {MAX_NESTING} levels"),
                    });
                }
                open.push(byte);
                previous = byte;
                i += 1;
            }
            b'}' | b']' => {
                open.pop();
                previous = byte;
                i += 1;
            }
            _ => {
                let start = i;
                while i < text.len()
                    && (text[i].is_ascii_alphanumeric() || matches!(text[i], b'+' | b'-' | b'.'))
                {
                    i += 1;
                }
                if i == start {
                    // Punctuation (`:` `,`) or a byte JSON does not allow; serde_json judges it.
                    previous = byte;
                    i += 1;
                    continue;
                }
                let token = &text[start..i];
                let key_position =
                    previous == b'{' || (previous == b',' && open.last() == Some(&b'{'));
                if !key_position && is_out_of_range_number(token) {
                    let output = output.get_or_insert_with(|| Vec::with_capacity(text.len() + 64));
                    output.extend_from_slice(&text[copied_up_to..start]);
                    let before = output.len();
                    output.push(b'"');
                    output.extend_from_slice(OUT_OF_RANGE_MARKER_ESCAPED);
                    output.extend_from_slice(token);
                    output.push(b'"');
                    replacements.push((output.len(), output.len() - before - token.len()));
                    copied_up_to = i;
                }
                previous = b'a';
            }
        }
    }
    let text = match output {
        Some(mut output) => {
            output.extend_from_slice(&text[copied_up_to..]);
            Cow::Owned(output)
        }
        None => Cow::Borrowed(text),
    };
    Ok(ShieldedText { text, replacements })
}

/// Whether `token` is a JSON number (RFC 8259 §6 grammar) that serde_json refuses as out of range.
/// Only a token with an exponent, or one longer than any finite `f64` needs without one (309
/// integer digits), can be; the others skip the second parse.
fn is_out_of_range_number(token: &[u8]) -> bool {
    let could_overflow = token.len() > 300 || token.iter().any(|&b| b == b'e' || b == b'E');
    could_overflow && is_json_number(token) && serde_json::from_slice::<f64>(token).is_err()
}

/// RFC 8259 §6: `-? (0 | [1-9][0-9]*) (. [0-9]+)? ([eE] [+-]? [0-9]+)?`.
fn is_json_number(token: &[u8]) -> bool {
    let mut rest = token.strip_prefix(b"-").unwrap_or(token);
    let digits = |s: &[u8]| s.iter().take_while(|b| b.is_ascii_digit()).count();
    let integer = digits(rest);
    if integer == 0 || (integer > 1 && rest[0] == b'0') {
        return false;
    }
    rest = &rest[integer..];
    if let Some(after_point) = rest.strip_prefix(b".") {
        let fraction = digits(after_point);
        if fraction == 0 {
            return false;
        }
        rest = &after_point[fraction..];
    }
    if let Some(after_e) = rest.strip_prefix(b"e").or_else(|| rest.strip_prefix(b"E")) {
        let after_sign = after_e
            .strip_prefix(b"+")
            .or_else(|| after_e.strip_prefix(b"-"))
            .unwrap_or(after_e);
        let exponent = digits(after_sign);
        if exponent == 0 {
            return false;
        }
        rest = &after_sign[exponent..];
    }
    rest.is_empty()
}

impl<'de> Deserialize<'de> for Node {
    fn deserialize<D: Deserializer<'de>>(deserializer: D) -> Result<Self, D::Error> {
        deserializer.deserialize_any(NodeVisitor)
    }
}

struct NodeVisitor;

impl<'de> Visitor<'de> for NodeVisitor {
    type Value = Node;

    fn expecting(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        formatter.write_str("any JSON value")
    }

    fn visit_unit<E>(self) -> Result<Node, E> {
        Ok(Node::Null)
    }

    fn visit_bool<E>(self, value: bool) -> Result<Node, E> {
        Ok(Node::Bool(value))
    }

    fn visit_i64<E>(self, value: i64) -> Result<Node, E> {
        Ok(Node::Number(value as f64))
    }

    fn visit_u64<E>(self, value: u64) -> Result<Node, E> {
        Ok(Node::Number(value as f64))
    }

    fn visit_f64<E>(self, value: f64) -> Result<Node, E> {
        Ok(Node::Number(value))
    }

    fn visit_str<E>(self, value: &str) -> Result<Node, E> {
        Ok(match value.strip_prefix(OUT_OF_RANGE_MARKER) {
            Some(token) => Node::OutOfRange(token.to_owned()),
            None => Node::String(value.to_owned()),
        })
    }

    fn visit_string<E: serde::de::Error>(self, value: String) -> Result<Node, E> {
        if value.starts_with(OUT_OF_RANGE_MARKER) {
            self.visit_str(&value)
        } else {
            Ok(Node::String(value))
        }
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Node, A::Error> {
        let mut items = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(4096));
        while let Some(item) = seq.next_element::<Node>()? {
            items.push(item);
        }
        Ok(Node::Array(items))
    }

    fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Node, A::Error> {
        let mut members = Vec::new();
        while let Some(name) = map.next_key_seed(NameSeed)? {
            members.push((name, map.next_value::<Node>()?));
        }
        Ok(Node::Object(members))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[track_caller]
    fn check(text: &str, expected: Node) {
        assert_eq!(parse(text.as_bytes()), Ok(expected), "{text}");
    }

    #[track_caller]
    fn check_error(text: &str, line: usize, column: usize, what: &str) {
        let error = parse(text.as_bytes()).unwrap_err();
        assert_eq!(
            (error.line, error.column),
            (line, column),
            "{text}: {error}"
        );
        assert!(error.what.contains(what), "{text}: {error}");
    }

    #[test]
    fn numbers_that_do_not_fit_a_double_become_out_of_range_nodes() {
        // IEEE 754 binary64: the largest finite value is about 1.7976931348623157e308 (a published
        // constant, f64::MAX), so 1e999 and -1e999 cannot be represented.
        check(
            "[1e999, -1E+400, 2.5]",
            Node::Array(vec![
                Node::OutOfRange("1e999".into()),
                Node::OutOfRange("-1E+400".into()),
                Node::Number(2.5),
            ]),
        );
        check("1.7976931348623157e308", Node::Number(f64::MAX));
        // Underflow is not an overflow: 1e-999 rounds to zero, as IEEE 754 rounding does.
        check("1e-999", Node::Number(0.0));
        // A number in a string stays a string.
        check(r#""1e999""#, Node::String("1e999".into()));
        check(
            r#"{"v": 1e999, "s": "a\"1e999"}"#,
            Node::Object(vec![
                ("v".into(), Node::OutOfRange("1e999".into())),
                ("s".into(), Node::String("a\"1e999".into())),
            ]),
        );
        // 310 digits without an exponent overflow too (f64::MAX has 309 integer digits).
        let huge = format!("[{}]", "9".repeat(310));
        check(&huge, Node::Array(vec![Node::OutOfRange("9".repeat(310))]));
    }

    #[test]
    fn known_member_names_are_not_copied() {
        let Ok(Node::Object(members)) = parse(br#"{"station": 1, "st\u0061tion": 2, "other": 3}"#)
        else {
            panic!("an object");
        };
        let names: Vec<&str> = members.iter().map(|(name, _)| &**name).collect();
        assert_eq!(names, ["station", "station", "other"]);
        assert!(matches!(members[0].0, Cow::Borrowed("station")));
        // An escaped name is the same name once decoded (RFC 8259 §7).
        assert!(matches!(members[1].0, Cow::Borrowed("station")));
        assert!(matches!(members[2].0, Cow::Owned(_)));
    }

    #[test]
    fn objects_keep_order_and_repeated_names() {
        // RFC 8259 §4: names SHOULD be unique but a parser may meet repeats; we keep them all so the
        // ingest rules can refuse them.
        check(
            r#"{"b": 1, "a": 2, "b": 3}"#,
            Node::Object(vec![
                ("b".into(), Node::Number(1.0)),
                ("a".into(), Node::Number(2.0)),
                ("b".into(), Node::Number(3.0)),
            ]),
        );
    }

    #[test]
    fn syntax_errors_are_positioned_in_the_original_text() {
        // RFC 8259 §6: NaN and Infinity are not JSON numbers.
        check_error("[NaN]", 1, 2, "expected value");
        check_error(r#"{"a": Infinity}"#, 1, 7, "expected value");
        check_error("[1,]", 1, 4, "trailing comma");
        check_error("{\n\"a\": 1,\n\"b\" 2}", 3, 5, "expected `:`");
        check_error("", 1, 0, "EOF");
        // A number as a key is malformed even when it is out of range.
        check_error("{1e999: 1}", 1, 2, "key must be a string");
        // serde_json's convention: the column of the offending byte, 1-based.
        check_error("[\n[1, x]]", 2, 5, "expected value");
        // The column after an out-of-range number that was shielded is still the original one:
        // the error is at the `x` in column 9 of line 2.
        check_error("[\n[1e999, x]]", 2, 9, "expected value");
        check_error("[1e999, 1e999, 1e999 x]", 1, 22, "expected `,` or `]`");
    }

    #[test]
    fn deep_nesting_is_a_syntax_error_not_a_crash() {
        let deep = "[".repeat(100_000);
        check_error(&deep, 1, MAX_NESTING + 1, "nested deeper than 64");
        let ok = format!("{}{}", "[".repeat(MAX_NESTING), "]".repeat(MAX_NESTING));
        assert!(parse(ok.as_bytes()).is_ok());
    }

    #[test]
    fn json_number_grammar() {
        // RFC 8259 §6 grammar, case by case.
        for good in ["0", "-0", "1", "10", "1.5", "1e5", "1E+5", "1e-5", "-0.0e0"] {
            assert!(is_json_number(good.as_bytes()), "{good}");
        }
        for bad in [
            "", "-", "01", "1.", ".5", "1e", "1e+", "+1", "0x10", "1.5.5", "--1",
        ] {
            assert!(!is_json_number(bad.as_bytes()), "{bad}");
        }
    }
}
