//! Byte-level mutations shared by the fuzz tests (`fuzz_decoders.rs`, `fuzz_import_rows.rs`): flip,
//! insert, delete, duplicate, truncate, and splice in (once or many times) one of a format's hostile
//! tokens. Each test draws its format's significant bytes more often than others and brings its
//! own tokens.

use proptest::prelude::*;

/// The number of cases: `default`, or `CONSENSOR_FUZZ_CASES` for a longer campaign by hand (CI
/// leaves it unset, so the run stays bounded).
pub fn cases(default: u32) -> u32 {
    std::env::var("CONSENSOR_FUZZ_CASES")
        .ok()
        .and_then(|text| text.parse().ok())
        .unwrap_or(default)
}

/// A finite number, the awkward ones (the largest, the smallest positive, -0.0, a missing-data
/// code) drawn often.
pub fn finite_value() -> impl Strategy<Value = f64> {
    prop_oneof![
        any::<f64>().prop_filter("finite", |v| v.is_finite()),
        -100.0..100.0f64,
        Just(-999.0),
        Just(f64::MAX),
        Just(f64::MIN_POSITIVE),
        Just(-0.0),
    ]
}

#[derive(Debug, Clone)]
pub enum Mutation {
    FlipByte {
        at: usize,
        mask: u8,
    },
    Insert {
        at: usize,
        byte: u8,
    },
    Delete {
        at: usize,
        len: usize,
    },
    Duplicate {
        at: usize,
        len: usize,
    },
    Truncate {
        at: usize,
    },
    Splice {
        at: usize,
        token: usize,
    },
    Repeat {
        at: usize,
        token: usize,
        times: usize,
    },
}

/// Mutations of texts in a format whose structure lies in `significant` bytes, with `tokens`
/// hostile tokens to splice in, deleting or duplicating at most `max_run` bytes at a time.
pub fn mutation(
    significant: &'static [u8],
    tokens: usize,
    max_run: usize,
) -> impl Strategy<Value = Mutation> {
    let byte = prop_oneof![prop::sample::select(significant.to_vec()), any::<u8>()];
    let at = any::<usize>();
    prop_oneof![
        (at, 1..=255u8).prop_map(|(at, mask)| Mutation::FlipByte { at, mask }),
        (at, byte).prop_map(|(at, byte)| Mutation::Insert { at, byte }),
        (at, 1..max_run).prop_map(|(at, len)| Mutation::Delete { at, len }),
        (at, 1..max_run * 4).prop_map(|(at, len)| Mutation::Duplicate { at, len }),
        at.prop_map(|at| Mutation::Truncate { at }),
        (at, 0..tokens).prop_map(|(at, token)| Mutation::Splice { at, token }),
        (at, 0..tokens, 2..200usize).prop_map(|(at, token, times)| Mutation::Repeat {
            at,
            token,
            times
        }),
    ]
}

/// Applies `mutation` to `bytes`; positions wrap around the current length, so every mutation
/// applies to any text, the empty one included.
pub fn apply(bytes: &mut Vec<u8>, mutation: &Mutation, tokens: &[&str]) {
    let position = |at: usize, len: usize| if len == 0 { 0 } else { at % (len + 1) };
    match *mutation {
        Mutation::FlipByte { at, mask } => {
            if !bytes.is_empty() {
                let index = at % bytes.len();
                bytes[index] ^= mask;
            }
        }
        Mutation::Insert { at, byte } => {
            let index = position(at, bytes.len());
            bytes.insert(index, byte);
        }
        Mutation::Delete { at, len } => {
            let start = position(at, bytes.len());
            let end = (start + len).min(bytes.len());
            bytes.drain(start..end);
        }
        Mutation::Duplicate { at, len } => {
            let start = position(at, bytes.len());
            let end = (start + len).min(bytes.len());
            let copy = bytes[start..end].to_vec();
            bytes.splice(end..end, copy);
        }
        Mutation::Truncate { at } => {
            let index = position(at, bytes.len());
            bytes.truncate(index);
        }
        Mutation::Splice { at, token } => {
            let index = position(at, bytes.len());
            bytes.splice(index..index, tokens[token].bytes());
        }
        Mutation::Repeat { at, token, times } => {
            let index = position(at, bytes.len());
            let run = tokens[token].repeat(times);
            bytes.splice(index..index, run.bytes());
        }
    }
}
