//! Text from outside (file names above all) made safe to log and print: a
//! control character in a name must not split a log line or reach a terminal
//! as an escape sequence.
//!
//! The bottom of the crate: anything that writes a name uses [`shown`], and
//! anything that shows a stored time to a person uses [`shown_time`].
//! JSON output needs none of it (serde escapes control characters).
//! A warning that can come again and again (a failing database, a sink that
//! is down) goes through [`Repeats`], so that it cannot flood the log.

use std::borrow::Cow;
use std::collections::HashMap;
use std::fmt::Display;
use std::sync::Mutex;
use std::time::{Duration, Instant};

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

/// Log lines that can repeat (the same failure at every retry, every file,
/// every check), limited per kind: the first line of a kind is logged at
/// once; lines of the same kind within the next `every` are counted, not
/// logged, and the next line after it (or [`Repeats::flush`], or the drop)
/// logs one summary: "3 more like this in the last 10 s; the last: …".
/// A kind is named by its call site, a short fixed text.
#[derive(Debug)]
pub struct Repeats {
    every: Duration,
    kinds: Mutex<HashMap<&'static str, Held>>,
}

/// What one kind of line holds back.
#[derive(Debug)]
struct Held {
    /// When the last line of this kind was logged.
    logged_at: Instant,
    /// Lines since then, not logged.
    count: u64,
    /// The last of them, with its level.
    last: Option<(Level, String)>,
}

/// The level a limited line is logged at.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Level {
    /// `tracing::warn!`.
    Warn,
    /// `tracing::error!`.
    Error,
}

impl Default for Repeats {
    /// At most one line of a kind every 10 s.
    fn default() -> Self {
        Repeats::new(Duration::from_secs(10))
    }
}

impl Repeats {
    /// At most one line of a kind every `every`.
    pub fn new(every: Duration) -> Repeats {
        Repeats {
            every,
            kinds: Mutex::new(HashMap::new()),
        }
    }

    /// Logs `message` as a warning, limited per `kind`.
    pub fn warn(&self, kind: &'static str, message: impl Display) {
        self.log(kind, Level::Warn, message);
    }

    /// Logs `message` as an error, limited per `kind`.
    pub fn error(&self, kind: &'static str, message: impl Display) {
        self.log(kind, Level::Error, message);
    }

    /// Logs the summaries of every kind with lines held back.
    pub fn flush(&self) {
        let held: Vec<(Level, String)> = match self.kinds.lock() {
            Ok(mut kinds) => kinds
                .values_mut()
                .filter_map(|h| summary(h, self.every))
                .collect(),
            Err(_) => Vec::new(),
        };
        for (level, line) in held {
            emit(level, &line);
        }
    }

    fn log(&self, kind: &'static str, level: Level, message: impl Display) {
        for (level, line) in self.admit(kind, level, message.to_string(), Instant::now()) {
            emit(level, &line);
        }
    }

    /// The lines to log now for a line of `kind` at `now`: none (held
    /// back), the line itself, or the summary of the held ones and the line.
    fn admit(
        &self,
        kind: &'static str,
        level: Level,
        message: String,
        now: Instant,
    ) -> Vec<(Level, String)> {
        let Ok(mut kinds) = self.kinds.lock() else {
            return vec![(level, message)];
        };
        match kinds.get_mut(kind) {
            Some(held) if now.saturating_duration_since(held.logged_at) < self.every => {
                held.count += 1;
                held.last = Some((level, message));
                Vec::new()
            }
            Some(held) => {
                let mut lines: Vec<(Level, String)> =
                    summary(held, now.saturating_duration_since(held.logged_at))
                        .into_iter()
                        .collect();
                held.logged_at = now;
                lines.push((level, message));
                lines
            }
            None => {
                kinds.insert(
                    kind,
                    Held {
                        logged_at: now,
                        count: 0,
                        last: None,
                    },
                );
                vec![(level, message)]
            }
        }
    }
}

impl Drop for Repeats {
    fn drop(&mut self) {
        self.flush();
    }
}

/// The line summing up what `held` kept back over `over`, and empties it.
fn summary(held: &mut Held, over: Duration) -> Option<(Level, String)> {
    let (level, last) = held.last.take()?;
    let count = std::mem::take(&mut held.count);
    let what = if count == 1 {
        "1 more like this".to_string()
    } else {
        format!("{count} more like this")
    };
    Some((
        level,
        format!(
            "{what} in the last {} s; the last: {last}",
            over.as_secs().max(1)
        ),
    ))
}

fn emit(level: Level, line: &str) {
    match level {
        Level::Warn => tracing::warn!("{line}"),
        Level::Error => tracing::error!("{line}"),
    }
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

    /// The first line of a kind is logged, the next ones within the window
    /// are held and summed up by the first line after it; kinds are apart.
    #[test]
    fn repeated_lines_are_summed_up_once_per_window() {
        let r = Repeats::new(Duration::from_secs(10));
        let t0 = Instant::now();
        let at = |s: u64| t0 + Duration::from_secs(s);
        let w = |m: &str| (Level::Warn, m.to_string());
        assert_eq!(r.admit("a", Level::Warn, "x1".into(), at(0)), [w("x1")]);
        assert!(r.admit("a", Level::Warn, "x2".into(), at(1)).is_empty());
        assert!(r.admit("a", Level::Warn, "x3".into(), at(9)).is_empty());
        // Another kind is not held back by the first.
        assert_eq!(
            r.admit("b", Level::Error, "y".into(), at(9)),
            [(Level::Error, "y".to_string())]
        );
        assert_eq!(
            r.admit("a", Level::Warn, "x4".into(), at(12)),
            [
                w("2 more like this in the last 12 s; the last: x3"),
                w("x4")
            ]
        );
        // Nothing held: the next line after the window comes alone.
        assert_eq!(r.admit("a", Level::Warn, "x5".into(), at(30)), [w("x5")]);
        assert!(r.admit("a", Level::Warn, "x6".into(), at(31)).is_empty());
        let mut kinds = r.kinds.lock().unwrap();
        let held = kinds.get_mut("a").unwrap();
        assert_eq!(
            summary(held, Duration::from_secs(5)),
            Some(w("1 more like this in the last 5 s; the last: x6"))
        );
        assert_eq!(summary(held, Duration::from_secs(5)), None, "emptied");
    }
}
