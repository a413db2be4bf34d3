-- framewarden schema, version 7: a drift alert names every position it holds
-- at (one cause, one alert), and says how it ended.

-- Each position an alert names, with the evidence of the frame that brought
-- it in (the value against its baseline, the chart's statistics).
CREATE TABLE alert_positions (
    alert_id     INTEGER NOT NULL REFERENCES alerts(id) ON DELETE CASCADE,
    position     TEXT    NOT NULL,
    joined_at_ms INTEGER NOT NULL,
    frame_id     INTEGER REFERENCES frames(id),
    message      TEXT    NOT NULL,
    PRIMARY KEY (alert_id, position)
) WITHOUT ROWID;

-- How an episode closed: 'recovered' (the condition cleared), 'closed' (the
-- run completed while it still held) or 'notice' (a one-off event); NULL
-- while open, and for episodes closed before v7.
ALTER TABLE alerts ADD COLUMN closed_state TEXT
    CHECK (closed_state IN ('recovered', 'closed', 'notice'));
