-- framewarden schema, version 7: frames in acquisition order, re-saved files
-- counted once, and a drift alert that names every position it holds at (one
-- cause, one alert) and says how it ended.

-- The time point the file-name pattern names, as a number (the digits of
-- `time_point`; NULL when the pattern names none).
ALTER TABLE frames ADD COLUMN time_point_index INTEGER;
-- When the frame was acquired: the modification time (ns) of the first
-- recorded version of its file in the run. With the time point it orders a
-- run's frames in acquisition order (store::ACQUISITION_ORDER_SQL).
ALTER TABLE frames ADD COLUMN acquired_ns INTEGER;
UPDATE frames SET acquired_ns = mtime_ns,
    time_point_index = CASE WHEN time_point GLOB '*[0-9]*'
        THEN CAST(ltrim(time_point, 'abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ_-') AS INTEGER) END;
CREATE INDEX frames_in_order ON frames (run_id, time_point_index, acquired_ns);

-- xxh3-64 of the decoded pixels of a done frame (NULL before v7 and for failures).
ALTER TABLE frames ADD COLUMN pixel_hash INTEGER;
-- A new version of a file whose pixels are those of the frame named here: kept
-- as a record, counted once (as that frame).
ALTER TABLE frames ADD COLUMN same_pixels_as INTEGER REFERENCES frames(id);
-- The later version, with other pixels, whose result replaced this row's; the
-- row is kept, and counted no more.
ALTER TABLE frames ADD COLUMN superseded_by INTEGER REFERENCES frames(id);
-- Which rows superseded another (the quality monitor's replay skips them).
CREATE INDEX frames_superseding ON frames (superseded_by) WHERE superseded_by IS NOT NULL;

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

-- Whether a worker has a queued frame in hand
-- (being analyzed) rather than waiting in the queue. An unclean stop counts an
-- interruption only for frames in hand: a frame that was only waiting was not
-- what stopped the service, and must not be recorded as failed for it.
ALTER TABLE frames ADD COLUMN in_hand INTEGER NOT NULL DEFAULT 0 CHECK (in_hand IN (0, 1));
