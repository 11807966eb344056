//! The station checks and the decision of one interval: which readings are set aside, by which rule
//! and why, and the consensus `Point` of what is left.

pub mod interval;
#[cfg(test)]
mod planted_faults;
pub mod quantity;

pub use interval::{
    screen_interval, IntervalInput, IntervalOutcome, IntervalScreen, Judged, JudgedInterval,
    JudgedStation, Judging, Point, Reading, Rules, StationReadings, StationValue, Status,
};
pub use quantity::{
    default_quantities, QuantitySpec, QuantitySpecError, StepLimits, DEFAULT_MISSING_CODES,
};

/// The rules that set a reading aside, in the order they are applied (API.md). A reading set aside
/// gets one record, for the first rule that caught it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Rule {
    /// The station sent `null`.
    MissingValue,
    /// The value as sent is one of the missing-data codes.
    MissingCode,
    /// The value lies outside the quantity's inclusive plausible range.
    OutOfRange,
    /// The station's readings varied less than the quantity's minimum over the past 60 minutes.
    FlatLine,
    /// The change from the station's previous accepted reading exceeded the limit for the gap, and the
    /// area's provisional consensus did not confirm the new value.
    Step,
    /// The station's value for the interval is more than the limit in robust scores from the area's
    /// median.
    FarFromConsensus,
}

impl Rule {
    /// All rules, in the order they are applied.
    pub const ALL: [Rule; 6] = [
        Rule::MissingValue,
        Rule::MissingCode,
        Rule::OutOfRange,
        Rule::FlatLine,
        Rule::Step,
        Rule::FarFromConsensus,
    ];

    /// The rule's name in the API.
    pub fn as_str(self) -> &'static str {
        match self {
            Rule::MissingValue => "missing_value",
            Rule::MissingCode => "missing_code",
            Rule::OutOfRange => "out_of_range",
            Rule::FlatLine => "flat_line",
            Rule::Step => "step",
            Rule::FarFromConsensus => "far_from_consensus",
        }
    }

    /// The rule for an API name.
    pub fn parse(text: &str) -> Option<Rule> {
        Self::ALL.into_iter().find(|rule| rule.as_str() == text)
    }
}

/// One reading set aside, with the numbers that explain why.
#[derive(Debug, Clone, PartialEq)]
pub struct SetAside {
    pub reading_id: u64,
    /// The station's index in the input (`StationReadings::station`).
    pub station: u32,
    pub observed_at_ms: i64,
    /// The canonical value (None for `null`).
    pub value: Option<f64>,
    /// The value as sent (before unit conversion).
    pub value_as_sent: Option<f64>,
    pub rule: Rule,
    /// The rule's statistic: for `step` the absolute change, for `flat_line` max − min over the
    /// window, for `out_of_range` the canonical value, for `far_from_consensus` the signed score of the
    /// station's value; `None` for the missing rules.
    pub score: Option<f64>,
    /// The limit the statistic crossed; `None` for the missing rules.
    pub threshold: Option<f64>,
    /// The median and scale of the cross-station test (or of the provisional consensus, for `step`).
    pub consensus_median: Option<f64>,
    pub consensus_spread: Option<f64>,
    /// For `step`: the gap to the previous accepted reading; for a per-minute range: the gap the limit
    /// was scaled by.
    pub gap_ms: Option<i64>,
    /// For `flat_line`: how many readings the 60-minute window held.
    pub window_readings: Option<u32>,
    /// For `far_from_consensus`: the station's value for the interval (the median of its readings
    /// that passed the earlier rules), which the score is computed on.
    pub station_value: Option<f64>,
}

impl SetAside {
    /// A sentence an operator can check by hand, with the numbers in it. `unit` is the canonical unit.
    pub fn reason(&self, unit: &str, missing_codes: &[f64]) -> String {
        let value = self.value.map_or_else(|| "null".to_owned(), number);
        match self.rule {
            Rule::MissingValue => "the station sent no value (null) for this time".to_owned(),
            Rule::MissingCode => {
                let sent = self.value_as_sent.or(self.value).map_or_else(|| "null".into(), number);
                let codes: Vec<String> = missing_codes.iter().map(|c| number(*c)).collect();
                format!(
                    "value {sent} as sent is a missing-data code (codes: {})",
                    codes.join(", ")
                )
            }
            Rule::OutOfRange => {
                let limit = self.threshold.unwrap_or(f64::NAN);
                let side = if self.value.unwrap_or(f64::NAN) < limit { "below the plausible minimum" } else { "above the plausible maximum" };
                match self.gap_ms {
                    Some(gap) => format!(
                        "value {value} {unit} is {side} {} {unit} ({} minutes since the previous accepted reading at the per-minute limit)",
                        number(limit),
                        number(gap as f64 / 60_000.0)
                    ),
                    None => format!("value {value} {unit} is {side} {} {unit}", number(limit)),
                }
            }
            Rule::FlatLine => format!(
                "the station's {} readings over the 60 minutes up to this one varied by only {} {unit}; at least {} {unit} is expected",
                self.window_readings.unwrap_or(0),
                number(self.score.unwrap_or(f64::NAN)),
                number(self.threshold.unwrap_or(f64::NAN)),
            ),
            Rule::Step => {
                let change = format!(
                    "value {value} {unit} changed by {} {unit} in {} minutes since the previous accepted reading; the limit for that gap is {} {unit}",
                    number(self.score.unwrap_or(f64::NAN)),
                    number(self.gap_ms.unwrap_or(0) as f64 / 60_000.0),
                    number(self.threshold.unwrap_or(f64::NAN)),
                );
                match (self.consensus_median, self.consensus_spread, self.value) {
                    (Some(median), Some(spread), Some(v)) => format!(
                        "{change}, and it is {} spreads from the area's provisional median {} {unit} (spread {}), beyond the limit 3.5 that would have confirmed the change",
                        number(((v - median) / spread).abs()),
                        number(median),
                        number(spread),
                    ),
                    _ => format!(
                        "{change}, and fewer than 3 stations gave a provisional consensus that could confirm it"
                    ),
                }
            }
            Rule::FarFromConsensus => {
                let score = self.score.unwrap_or(f64::NAN);
                let direction = if score >= 0.0 { "above" } else { "below" };
                format!(
                    "station value {} {unit} (median of its readings this interval) is {} spreads {direction} the area median {} {unit} (spread {}); limit {}",
                    self.station_value.map_or_else(|| "null".into(), number),
                    number(score.abs()),
                    number(self.consensus_median.unwrap_or(f64::NAN)),
                    number(self.consensus_spread.unwrap_or(f64::NAN)),
                    number(self.threshold.unwrap_or(f64::NAN)),
                )
            }
        }
    }
}

/// A number for a sentence: at most three decimals, trailing zeros dropped but one kept
/// (`13.8`, `30.0`, `0.125`, `-999.0`).
pub fn number(value: f64) -> String {
    if !value.is_finite() {
        return value.to_string();
    }
    let mut text = format!("{value:.3}");
    while text.ends_with('0') && !text.ends_with(".0") {
        text.pop();
    }
    if text == "-0.0" {
        text = "0.0".into();
    }
    text
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_read_naturally() {
        assert_eq!(number(13.8), "13.8");
        assert_eq!(number(30.0), "30.0");
        assert_eq!(number(0.125), "0.125");
        assert_eq!(number(1.0 / 3.0), "0.333");
        assert_eq!(number(-999.0), "-999.0");
        assert_eq!(number(-0.0001), "0.0");
    }

    #[test]
    fn rule_names_round_trip() {
        for rule in Rule::ALL {
            assert_eq!(Rule::parse(rule.as_str()), Some(rule));
        }
        assert_eq!(Rule::parse("bogus"), None);
    }
}
