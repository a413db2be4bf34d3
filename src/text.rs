//! Text from outside (file names above all) made safe to log and print: a
//! control character in a name must not split a log line or reach a terminal
//! as an escape sequence.
//!
//! The bottom of the crate: anything that writes a name uses [`shown`], and
//! anything that shows a stored time to a person uses [`shown_time`].
//! JSON output needs none of it (serde escapes control characters).

use std::borrow::Cow;

/// `text` with every control character (newline, tab, escape, DEL, C1
/// controls …) written as a Rust-style escape, `\n`, `\t` or `\u{1b}`;
/// borrowed when there is none.
///
/// ```
/// use framewarden::text::shown;
/// assert_eq!(shown("A01_t0001.tif"), "A01_t0001.tif");
/// assert_eq!(shown("a\nb\u{1b}[31m.tif"), "a\\nb\\u{1b}[31m.tif");
/// ```
pub fn shown(text: &str) -> Cow<'_, str> {
    if !text.chars().any(char::is_control) {
        return Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        if c.is_control() {
            out.extend(c.escape_debug());
        } else {
            out.push(c);
        }
    }
    Cow::Owned(out)
}

/// A path as [`shown`] text (lossy for names that are not UTF-8).
pub fn shown_path(path: &std::path::Path) -> String {
    shown(&path.to_string_lossy()).into_owned()
}

/// A time the store wrote as RFC 3339 UTC text (`2026-12-02T10:04:05.250Z`)
/// shown for a person in `zone`, to the second, with the zone's UTC offset:
/// `2026-12-02 11:04:05 +01:00`. Text that is not such a time is returned
/// [`shown`] as it is.
///
/// ```
/// use framewarden::text::shown_time;
/// let paris = jiff::tz::TimeZone::get("Europe/Paris").unwrap();
/// assert_eq!(shown_time("2026-12-02T10:04:05.250Z", &paris), "2026-12-02 11:04:05 +01:00");
/// assert_eq!(
///     shown_time("2026-07-01T22:30:00.000Z", &jiff::tz::TimeZone::UTC),
///     "2026-07-01 22:30:00 +00:00"
/// );
/// ```
pub fn shown_time(utc: &str, zone: &jiff::tz::TimeZone) -> String {
    match utc.parse::<jiff::Timestamp>() {
        Ok(t) => zoned(t, zone),
        Err(_) => shown(utc).into_owned(),
    }
}

/// [`shown_time`] of a time in milliseconds since the Unix epoch.
///
/// ```
/// use framewarden::text::shown_time_ms;
/// let paris = jiff::tz::TimeZone::get("Europe/Paris").unwrap();
/// assert_eq!(shown_time_ms(1_764_669_845_250, &paris), "2025-12-02 11:04:05 +01:00");
/// ```
pub fn shown_time_ms(ms: i64, zone: &jiff::tz::TimeZone) -> String {
    jiff::Timestamp::from_millisecond(ms).map_or_else(|_| format!("{ms} ms"), |t| zoned(t, zone))
}

fn zoned(t: jiff::Timestamp, zone: &jiff::tz::TimeZone) -> String {
    t.to_zoned(zone.clone())
        .strftime("%Y-%m-%d %H:%M:%S %:z")
        .to_string()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_control_characters_change() {
        // Quotes, backslashes and non-ASCII letters stay as they are; C0, DEL
        // and C1 controls are escaped.
        assert_eq!(shown("«été» 'q' \\ \"x\""), "«été» 'q' \\ \"x\"");
        assert_eq!(shown("\r\t\u{7f}\u{85}"), "\\r\\t\\u{7f}\\u{85}");
        assert!(matches!(shown("plain"), Cow::Borrowed(_)));
    }
}
