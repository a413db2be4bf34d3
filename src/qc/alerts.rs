//! Alert episodes: a condition opens one alert when it becomes true and one
//! "recovered" event when it clears, however many frames it stays true for.
//! A condition that holds at positions (a drift) is one episode for every
//! position it reaches within the group window of its opening: the positions
//! share a cause, so one alert names them all, grows as more join, and
//! recovers when every one of them has.
//!
//! Pure bookkeeping. Deciding whether a condition holds is the monitor's; storing
//! and delivering alerts belong to [`crate::qc::recorder`] and [`crate::qc::sinks`].

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

/// Whether an event opens, grows or closes an episode, or is a one-off notice
/// (an episode that opens and closes at once: the service restarted, the run
/// is complete).
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum AlertState {
    /// The condition became true: an episode opens (JSON `opened`).
    Opened,
    /// More positions joined an open episode (JSON `updated`): not a new alert.
    Updated,
    /// The condition cleared: its episode closes (JSON `recovered`).
    Recovered,
    /// The run completed while the condition still held: the episode closes
    /// with its run, not recovered (JSON `closed`).
    Closed,
    /// A one-off event that opens and closes at once (JSON `notice`).
    Notice,
}

impl AlertState {
    /// The same words as the JSON form.
    pub fn as_str(self) -> &'static str {
        match self {
            AlertState::Opened => "opened",
            AlertState::Updated => "updated",
            AlertState::Recovered => "recovered",
            AlertState::Closed => "closed",
            AlertState::Notice => "notice",
        }
    }
}

/// One alert event, as stored, logged and sent to the sinks.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct AlertEvent {
    /// What is wrong: `drift:<metric>`, `stalled`, `low_disk_space:<volume>`,
    /// `failure_rate`; or what happened: `service_restarted`, `run_complete`.
    pub condition: String,
    /// Whether the event opens, grows or closes an episode, or is a notice.
    pub state: AlertState,
    /// Milliseconds since the Unix epoch.
    pub at_ms: i64,
    /// When the episode this event belongs to opened (ms since the epoch); with
    /// `condition`, it tells an update or a recovery which alert it is about.
    pub opened_at_ms: i64,
    /// The file that triggered (or ended) the episode, when a frame did.
    pub file: Option<String>,
    /// The positions the episode names, in order; empty for a condition of the
    /// whole run (a stall, a failure rate, free space, a notice).
    pub positions: Vec<String>,
    /// The position whose frame caused the event (it opened or joined the
    /// episode, or was the last to recover) and its evidence; `None` when no
    /// one position did.
    pub evidence: Option<PositionEvidence>,
    /// A sentence for a person saying what happened, with the values behind it.
    pub message: String,
}

/// One position's part in a drift episode: the value and the chart's
/// statistics at the frame that brought it in (or out).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct PositionEvidence {
    /// The position (well, site, channel).
    pub position: String,
    /// The value against its baseline, and the statistics behind the drift.
    pub message: String,
}

impl PositionEvidence {
    /// "A01: <evidence>".
    pub fn sentence(&self) -> String {
        format!("{}: {}", self.position, self.message)
    }
}

impl AlertEvent {
    /// A notice: an episode of the whole run that opens and closes at `at_ms`.
    pub fn notice(condition: &str, at_ms: i64, file: Option<&str>, message: String) -> AlertEvent {
        AlertEvent {
            condition: condition.to_string(),
            state: AlertState::Notice,
            at_ms,
            opened_at_ms: at_ms,
            file: file.map(str::to_string),
            positions: Vec::new(),
            evidence: None,
            message,
        }
    }
}

/// The open episodes of conditions of the whole run, by condition, with the
/// time each opened.
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
        let (state, opened_at_ms) = match (holds, self.open.get(condition).copied()) {
            (true, None) => {
                self.open.insert(condition.to_string(), at_ms);
                (AlertState::Opened, at_ms)
            }
            (false, Some(opened_at_ms)) => {
                self.open.remove(condition);
                (AlertState::Recovered, opened_at_ms)
            }
            _ => return None,
        };
        Some(AlertEvent {
            condition: condition.to_string(),
            state,
            at_ms,
            opened_at_ms,
            file: file.map(str::to_string),
            positions: Vec::new(),
            evidence: None,
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

    /// Closes every open episode without recovery (the run is over): the
    /// conditions and the times they opened, in condition order.
    pub fn close_all(&mut self) -> Vec<(String, i64)> {
        std::mem::take(&mut self.open).into_iter().collect()
    }
}

/// One open episode of a condition that holds at positions.
#[derive(Debug, Clone, PartialEq)]
pub struct Group {
    /// The condition, e.g. `drift:background_level`.
    pub condition: String,
    /// When the first position opened it (ms since the epoch).
    pub opened_at_ms: i64,
    /// Every position the episode names, and whether the condition still
    /// holds there (`false`: recovered, still named).
    pub members: BTreeMap<String, bool>,
}

impl Group {
    /// Every position named, in order.
    pub fn positions(&self) -> Vec<String> {
        self.members.keys().cloned().collect()
    }

    /// The positions where the condition still holds, in order.
    pub fn holding(&self) -> Vec<String> {
        self.members
            .iter()
            .filter(|(_, &holds)| holds)
            .map(|(p, _)| p.clone())
            .collect()
    }
}

/// What a position entering a condition did to the episodes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Entry {
    /// It opened a new episode.
    Opened,
    /// It joined an open episode that did not name it yet.
    Joined,
    /// It is back in an open episode that already names it (it had recovered
    /// while others had not): nothing new to say.
    Returned,
    /// The condition already held there: nothing changed.
    Unchanged,
}

/// What a position leaving a condition did to its episode.
#[derive(Debug, Clone, PartialEq)]
pub enum Exit {
    /// The condition did not hold there.
    Unchanged,
    /// It recovered; others named by the episode still hold it open.
    Recovered,
    /// It was the last: the episode is over and removed.
    AllRecovered(Group),
}

/// The open episodes of conditions that hold at positions, grouped by cause:
/// a position joins an open episode of the same condition that opened at
/// most `window_ms` before, else it opens a new one.
#[derive(Debug, Clone, Default)]
pub struct GroupBook {
    window_ms: i64,
    groups: Vec<Group>,
}

impl GroupBook {
    /// No open episode; positions within `window_ms` of an opening join it.
    pub fn new(window_ms: i64) -> GroupBook {
        GroupBook {
            window_ms,
            groups: Vec::new(),
        }
    }

    /// `condition` now holds at `position`; returns what that did and the
    /// episode it belongs to.
    pub fn enter(&mut self, condition: &str, position: &str, at_ms: i64) -> (Entry, &Group) {
        let open = |g: &Group| g.condition == condition;
        let (entry, index) = if let Some(i) = self
            .groups
            .iter()
            .position(|g| open(g) && g.members.contains_key(position))
        {
            let holds = self.groups[i].members.insert(position.to_string(), true);
            let entry = if holds == Some(true) {
                Entry::Unchanged
            } else {
                Entry::Returned
            };
            (entry, i)
        } else if let Some(i) = self
            .groups
            .iter()
            .rposition(|g| open(g) && at_ms - g.opened_at_ms <= self.window_ms)
        {
            self.groups[i].members.insert(position.to_string(), true);
            (Entry::Joined, i)
        } else {
            self.groups.push(Group {
                condition: condition.to_string(),
                opened_at_ms: at_ms,
                members: BTreeMap::from([(position.to_string(), true)]),
            });
            (Entry::Opened, self.groups.len() - 1)
        };
        (entry, &self.groups[index])
    }

    /// `condition` no longer holds at `position`.
    pub fn leave(&mut self, condition: &str, position: &str) -> Exit {
        let Some(i) = self
            .groups
            .iter()
            .position(|g| g.condition == condition && g.members.get(position) == Some(&true))
        else {
            return Exit::Unchanged;
        };
        self.groups[i].members.insert(position.to_string(), false);
        if self.groups[i].members.values().any(|&holds| holds) {
            Exit::Recovered
        } else {
            Exit::AllRecovered(self.groups.remove(i))
        }
    }

    /// Puts back an episode stored open (restoring state after a restart).
    pub fn restore(&mut self, group: Group) {
        self.groups.push(group);
    }

    /// Closes every open episode without recovery (the run is over), in the
    /// order they opened.
    pub fn close_all(&mut self) -> Vec<Group> {
        std::mem::take(&mut self.groups)
    }
}

/// Names positions for a sentence: all of them up to [`LISTED`], else the
/// first `LISTED - 1` and how many more (the alert's `positions` keep all).
pub fn list_positions(positions: &[String]) -> String {
    if positions.len() <= LISTED {
        positions.join(", ")
    } else {
        format!(
            "{}, … and {} more",
            positions[..LISTED - 1].join(", "),
            positions.len() - (LISTED - 1)
        )
    }
}

/// Positions named in full in a sentence: two rows of a 96-well plate read at
/// a glance; a longer list is cut, and the alert's JSON carries every name.
pub const LISTED: usize = 24;

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

    #[test]
    fn a_recovery_names_the_opening_it_ends_and_close_all_empties_the_book() {
        let mut book = AlertBook::default();
        book.set("stalled", true, 7, None, || "m".into());
        let back = book.set("stalled", false, 9, None, || "m".into()).unwrap();
        assert_eq!((back.at_ms, back.opened_at_ms), (9, 7));
        book.set("failure_rate", true, 11, None, || "m".into());
        book.restore("stalled", 3);
        assert_eq!(
            book.close_all(),
            [("failure_rate".to_string(), 11), ("stalled".to_string(), 3)]
        );
        assert!(!book.is_open("stalled") && !book.is_open("failure_rate"));
    }

    const D: &str = "drift:background_level";

    /// Window 10 ms. A01 opens at 0; A02 (at 4) and A03 (at 10, on the limit)
    /// join; A04 at 11 is past the window and opens a second episode; B01 at
    /// 12 joins that newer one.
    #[test]
    fn positions_within_the_window_of_an_opening_join_it() {
        let mut book = GroupBook::new(10);
        let steps: Vec<(Entry, i64, Vec<String>)> = [
            ("A01", 0),
            ("A02", 4),
            ("A03", 10),
            ("A04", 11),
            ("B01", 12),
        ]
        .iter()
        .map(|&(p, at)| {
            let (entry, g) = book.enter(D, p, at);
            (entry, g.opened_at_ms, g.positions())
        })
        .collect();
        let names = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
        assert_eq!(
            steps,
            [
                (Entry::Opened, 0, names(&["A01"])),
                (Entry::Joined, 0, names(&["A01", "A02"])),
                (Entry::Joined, 0, names(&["A01", "A02", "A03"])),
                (Entry::Opened, 11, names(&["A04"])),
                (Entry::Joined, 11, names(&["A04", "B01"])),
            ]
        );
        // Another condition at the same position is another episode.
        assert_eq!(book.enter("drift:focus", "A01", 1).0, Entry::Opened);
    }

    /// The episode recovers only when its last position has; a position that
    /// recovered and drifts again while the episode is open is back in it,
    /// with nothing new to say, even past the window.
    #[test]
    fn an_episode_recovers_when_all_its_positions_have() {
        let mut book = GroupBook::new(10);
        book.enter(D, "A01", 0);
        book.enter(D, "A02", 1);
        assert_eq!(book.enter(D, "A02", 2).0, Entry::Unchanged);
        assert_eq!(book.leave(D, "A01"), Exit::Recovered);
        assert_eq!(book.leave(D, "A01"), Exit::Unchanged, "already recovered");
        assert_eq!(book.leave(D, "C09"), Exit::Unchanged, "never drifted");
        assert_eq!(book.enter(D, "A01", 500).0, Entry::Returned);
        assert_eq!(book.leave(D, "A02"), Exit::Recovered);
        let Exit::AllRecovered(group) = book.leave(D, "A01") else {
            panic!("the last position recovered: the episode is over")
        };
        assert_eq!(group.positions(), ["A01", "A02"]);
        assert!(group.holding().is_empty());
        // Over: the next drift at A01 opens a new episode.
        assert_eq!(book.enter(D, "A01", 501).0, Entry::Opened);
    }

    #[test]
    fn close_all_ends_every_episode_and_restore_puts_one_back() {
        let mut book = GroupBook::new(10);
        book.enter(D, "A01", 0);
        book.enter(D, "A02", 1);
        book.leave(D, "A02");
        let closed = book.close_all();
        assert_eq!(closed.len(), 1);
        assert_eq!(closed[0].holding(), ["A01"]);
        assert_eq!(closed[0].positions(), ["A01", "A02"]);
        assert_eq!(book.leave(D, "A01"), Exit::Unchanged, "nothing open");
        book.restore(closed[0].clone());
        assert_eq!(book.enter(D, "A02", 100).0, Entry::Returned);
        assert!(matches!(book.leave(D, "A01"), Exit::Recovered));
        assert!(matches!(book.leave(D, "A02"), Exit::AllRecovered(_)));
    }

    #[test]
    fn a_long_list_of_positions_is_cut_with_a_count() {
        let few: Vec<String> = ["A01", "A02", "B07"].map(String::from).to_vec();
        assert_eq!(list_positions(&few), "A01, A02, B07");
        let plate: Vec<String> = (1..=96).map(|i| format!("P{i:02}")).collect();
        let text = list_positions(&plate);
        assert!(text.starts_with("P01, P02, "), "{text}");
        assert!(text.ends_with("P23, … and 73 more"), "{text}");
        assert_eq!(
            list_positions(&plate[..LISTED]).matches(", ").count(),
            LISTED - 1
        );
    }
}
