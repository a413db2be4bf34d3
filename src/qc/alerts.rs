//! Alert episodes: a condition opens one alert when it becomes true and one
//! "recovered" event when it clears, however many frames it stays true for.
//!
//! Pure bookkeeping. Deciding whether a condition holds is the monitor's; storing
//! and delivering alerts belong to [`crate::qc::recorder`] and [`crate::qc::sinks`].

use std::collections::BTreeMap;

use serde::Serialize;

/// Whether an event opens or closes an episode, or is a one-off notice (an
/// episode that opens and closes at once: the service restarted, the run is
/// complete).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum AlertState {
    /// The condition became true: an episode opens (JSON `opened`).
    Opened,
    /// The condition cleared: its episode closes (JSON `recovered`).
    Recovered,
    /// A one-off event that opens and closes at once (JSON `notice`).
    Notice,
}

impl AlertState {
    /// The same words as the JSON form.
    pub fn as_str(self) -> &'static str {
        match self {
            AlertState::Opened => "opened",
            AlertState::Recovered => "recovered",
            AlertState::Notice => "notice",
        }
    }
}

/// One alert event, as stored, logged and sent to the sinks.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct AlertEvent {
    /// What is wrong: `drift:<metric>`, `stalled`, `low_disk_space:<volume>`,
    /// `failure_rate`; or what happened: `service_restarted`, `run_complete`.
    pub condition: String,
    /// Whether the event opens or closes an episode, or is a notice.
    pub state: AlertState,
    /// Milliseconds since the Unix epoch.
    pub at_ms: i64,
    /// The file that triggered (or ended) the episode, when a frame did.
    pub file: Option<String>,
    /// A sentence for a person saying what happened, with the values behind it.
    pub message: String,
}

/// The open episodes, by condition.
#[derive(Debug, Clone, Default)]
pub struct AlertBook {
    open: BTreeMap<String, i64>,
}

impl AlertBook {
    /// Records whether `condition` holds now; returns an event only when that
    /// changes. `message` is asked for only then.
    pub fn set(
        &mut self,
        condition: &str,
        holds: bool,
        at_ms: i64,
        file: Option<&str>,
        message: impl FnOnce() -> String,
    ) -> Option<AlertEvent> {
        let state = match (holds, self.open.contains_key(condition)) {
            (true, false) => {
                self.open.insert(condition.to_string(), at_ms);
                AlertState::Opened
            }
            (false, true) => {
                self.open.remove(condition);
                AlertState::Recovered
            }
            _ => return None,
        };
        Some(AlertEvent {
            condition: condition.to_string(),
            state,
            at_ms,
            file: file.map(str::to_string),
            message: message(),
        })
    }

    /// Whether an episode of `condition` is open now.
    pub fn is_open(&self, condition: &str) -> bool {
        self.open.contains_key(condition)
    }

    /// Marks an episode open without an event (restoring state after a restart).
    pub fn restore(&mut self, condition: &str, opened_at_ms: i64) {
        self.open.insert(condition.to_string(), opened_at_ms);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn one_event_per_change_not_per_frame() {
        let mut book = AlertBook::default();
        let states: Vec<Option<AlertState>> = [false, true, true, true, false, false, true]
            .iter()
            .enumerate()
            .map(|(i, &holds)| {
                book.set("stalled", holds, i as i64, None, || "m".into())
                    .map(|e| e.state)
            })
            .collect();
        assert_eq!(
            states,
            vec![
                None,
                Some(AlertState::Opened),
                None,
                None,
                Some(AlertState::Recovered),
                None,
                Some(AlertState::Opened)
            ]
        );
        assert!(book.is_open("stalled") && !book.is_open("failure_rate"));
    }
}
