//! Look-back lengths (`7d`, `all`) and plain day counts (`30d`) as written in pipeline files.

use schemars::JsonSchema;
use serde::{de, Deserialize, Deserializer, Serialize, Serializer};
use std::fmt;

/// A look-back window: a positive whole number of days, or `all` (unbounded).
///
/// A window of `W` days covers event times in `[cutoff - W days, cutoff)`, where days are
/// calendar days in the pipeline's time zone, so a window that spans a daylight-saving change
/// covers 23 or 25 hours for that day.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord)]
pub enum Window {
    /// The last `n` calendar days before the cutoff (`n >= 1`).
    Days(u32),
    /// Every event before the cutoff.
    All,
}

impl Window {
    /// The suffix used when a list of windows expands into one feature per window (`7d`, `all`).
    pub fn suffix(&self) -> String {
        match self {
            Window::Days(n) => format!("{n}d"),
            Window::All => "all".to_string(),
        }
    }

    /// The number of days, or `None` for an unbounded window.
    pub fn days(&self) -> Option<u32> {
        match self {
            Window::Days(n) => Some(*n),
            Window::All => None,
        }
    }
}

impl fmt::Display for Window {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.suffix())
    }
}

/// The largest window or day count accepted: 100 years of days.
pub const MAX_DAYS: u32 = 36_600;

/// Parses `Nd` (N a positive whole number of days). Returns a message naming what is wrong.
pub fn parse_days(text: &str, allow_zero: bool) -> Result<u32, String> {
    let t = text.trim();
    let Some(number) = t.strip_suffix('d') else {
        return Err(format!(
            "`{t}` is not a whole number of days: write it as `Nd`, for example `7d`"
        ));
    };
    if number.is_empty() || !number.chars().all(|c| c.is_ascii_digit()) {
        return Err(format!(
            "`{t}` is not a whole number of days: write it as `Nd`, for example `7d`"
        ));
    }
    let n: u32 = number
        .parse()
        .map_err(|_| format!("`{t}` is too long: at most {MAX_DAYS}d"))?;
    if n == 0 && !allow_zero {
        return Err(format!("`{t}` is empty: a window must be at least `1d`"));
    }
    if n > MAX_DAYS {
        return Err(format!("`{t}` is too long: at most {MAX_DAYS}d"));
    }
    Ok(n)
}

impl std::str::FromStr for Window {
    type Err = String;
    fn from_str(s: &str) -> Result<Self, String> {
        if s.trim() == "all" {
            return Ok(Window::All);
        }
        parse_days(s, false).map(Window::Days)
    }
}

struct WindowVisitor;

impl de::Visitor<'_> for WindowVisitor {
    type Value = Window;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a window such as `7d` or `all`")
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<Window, E> {
        v.parse().map_err(E::custom)
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<Window, E> {
        Err(E::custom(format!(
            "`{v}` has no unit: write windows as `Nd`, for example `{v}d`"
        )))
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<Window, E> {
        Err(E::custom(format!(
            "`{v}` has no unit: write windows as `Nd`, for example `7d`"
        )))
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<Window, E> {
        Err(E::custom(format!(
            "`{v}` is not a whole number of days: write windows as `Nd`, for example `7d`"
        )))
    }
}

impl<'de> Deserialize<'de> for Window {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(WindowVisitor)
    }
}

impl Serialize for Window {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&self.suffix())
    }
}

impl JsonSchema for Window {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        "Window".into()
    }
    fn json_schema(_: &mut schemars::SchemaGenerator) -> schemars::Schema {
        schemars::json_schema!({
            "type": "string",
            "pattern": "^([1-9][0-9]*d|all)$",
            "description": "A look-back window: a positive whole number of days (`7d`) or `all`."
        })
    }
}

/// A non-negative whole number of days (`0d`, `30d`), used for label horizons and grace periods.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Default)]
pub struct DayCount(pub u32);

struct DayCountVisitor;

impl de::Visitor<'_> for DayCountVisitor {
    type Value = DayCount;
    fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
        f.write_str("a number of days such as `30d`")
    }
    fn visit_str<E: de::Error>(self, v: &str) -> Result<DayCount, E> {
        parse_days(v, true).map(DayCount).map_err(E::custom)
    }
    fn visit_u64<E: de::Error>(self, v: u64) -> Result<DayCount, E> {
        Err(E::custom(format!(
            "`{v}` has no unit: write days as `Nd`, for example `{v}d`"
        )))
    }
    fn visit_i64<E: de::Error>(self, v: i64) -> Result<DayCount, E> {
        Err(E::custom(format!(
            "`{v}` has no unit: write days as `Nd`, for example `30d`"
        )))
    }
    fn visit_f64<E: de::Error>(self, v: f64) -> Result<DayCount, E> {
        Err(E::custom(format!(
            "`{v}` is not a whole number of days: write days as `Nd`, for example `30d`"
        )))
    }
}

impl<'de> Deserialize<'de> for DayCount {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(DayCountVisitor)
    }
}

impl Serialize for DayCount {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&format!("{}d", self.0))
    }
}

impl JsonSchema for DayCount {
    fn schema_name() -> std::borrow::Cow<'static, str> {
        "DayCount".into()
    }
    fn json_schema(_: &mut schemars::SchemaGenerator) -> schemars::Schema {
        schemars::json_schema!({
            "type": "string",
            "pattern": "^[0-9]+d$",
            "description": "A whole number of days, such as `30d`."
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn windows_parse() {
        assert_eq!("7d".parse::<Window>(), Ok(Window::Days(7)));
        assert_eq!("all".parse::<Window>(), Ok(Window::All));
        assert!("0d"
            .parse::<Window>()
            .unwrap_err()
            .contains("at least `1d`"));
        assert!("7h"
            .parse::<Window>()
            .unwrap_err()
            .contains("whole number of days"));
        assert!("1.5d"
            .parse::<Window>()
            .unwrap_err()
            .contains("whole number of days"));
        assert!("-3d"
            .parse::<Window>()
            .unwrap_err()
            .contains("whole number of days"));
        assert!("99999999999d"
            .parse::<Window>()
            .unwrap_err()
            .contains("too long"));
    }
}
