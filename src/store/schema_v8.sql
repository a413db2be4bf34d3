-- framewarden schema, version 8: analyses (reprocessing), stack pages and
-- alert deliveries.

-- reprocess
-- An analysis is one set of results of a run's frames: the watch service's
-- own (number 1, in frames/objects/flags/alerts), and one more for each
-- `framewarden reprocess` (numbers 2, 3, …, in the analysis_* tables below,
-- keyed by the frame rows they re-read). The original rows are never changed.
CREATE TABLE analyses (
    id            INTEGER PRIMARY KEY,
    run_id        INTEGER NOT NULL REFERENCES runs(id),
    number        INTEGER NOT NULL,              -- 1, 2, … within the run
    created_at_ms INTEGER NOT NULL,
    settings      TEXT    NOT NULL,              -- TOML (Settings::to_toml); number 1: the run's
    source        TEXT    NOT NULL CHECK (source IN ('watch', 'reprocess')),
    -- NULL while a reprocess is still recording it (one stopped before its
    -- end is never shown, and the next reprocess of the run clears it).
    finished_at_ms INTEGER,
    UNIQUE (run_id, number)
);
-- Results recorded so far are the watch service's: analysis 1 of their run.
INSERT INTO analyses (run_id, number, created_at_ms, settings, source, finished_at_ms)
    SELECT id, 1, started_at_ms, settings, 'watch', started_at_ms FROM runs;
CREATE TRIGGER runs_first_analysis AFTER INSERT ON runs BEGIN
    INSERT INTO analyses (run_id, number, created_at_ms, settings, source, finished_at_ms)
        VALUES (NEW.id, 1, NEW.started_at_ms, NEW.settings, 'watch', NEW.started_at_ms);
END;
-- A reprocessed frame's result: the measures the watch service keeps in
-- frames, for the frame row `frame_id` (its file, position and time point).
-- status 'failed' with the error when the file could not be re-read.
CREATE TABLE analysis_frames (
    analysis_id          INTEGER NOT NULL REFERENCES analyses(id),
    frame_id             INTEGER NOT NULL REFERENCES frames(id),
    status               TEXT    NOT NULL CHECK (status IN ('done', 'failed')),
    error                TEXT,
    analyzed_at_ms       INTEGER NOT NULL,
    width                INTEGER,
    height               INTEGER,
    bit_depth            INTEGER,
    method               TEXT,
    threshold            REAL,
    separability         REAL,
    object_count         INTEGER,
    foreground_fraction  REAL,
    background_level     REAL,
    saturation_fraction  REAL,
    focus                REAL,
    illumination_change  REAL,
    pixel_size_um        REAL,
    pixel_size_source    TEXT,
    bimodality           REAL,
    size_filtered        INTEGER,
    merged_fraction      REAL,
    pixel_hash           INTEGER,
    recount_threshold    REAL,
    recount_object_count INTEGER,
    count_source         TEXT,
    PRIMARY KEY (analysis_id, frame_id)
) WITHOUT ROWID;
-- The objects of a reprocessed frame (columns as in objects).
CREATE TABLE analysis_objects (
    analysis_id          INTEGER NOT NULL REFERENCES analyses(id),
    frame_id             INTEGER NOT NULL REFERENCES frames(id),
    result               TEXT    NOT NULL CHECK (result IN ('raw', 'recount')),
    label                INTEGER NOT NULL,
    area_px              INTEGER NOT NULL,
    area_um2             REAL,
    centroid_x           REAL NOT NULL,
    centroid_y           REAL NOT NULL,
    bbox_x_min           INTEGER NOT NULL,
    bbox_y_min           INTEGER NOT NULL,
    bbox_x_max           INTEGER NOT NULL,
    bbox_y_max           INTEGER NOT NULL,
    mean_intensity       REAL NOT NULL,
    integrated_intensity REAL NOT NULL,
    max_intensity        REAL NOT NULL,
    perimeter_px         REAL NOT NULL,
    circularity          REAL NOT NULL,
    major_axis_px        REAL NOT NULL,
    minor_axis_px        REAL NOT NULL,
    eccentricity         REAL NOT NULL,
    solidity             REAL,
    channels             TEXT,
    PRIMARY KEY (analysis_id, frame_id, result, label)
) WITHOUT ROWID;
-- The flags of a reprocessed frame, judged again by the quality monitor in
-- acquisition order (columns as in flags).
CREATE TABLE analysis_flags (
    id          INTEGER PRIMARY KEY,
    analysis_id INTEGER NOT NULL REFERENCES analyses(id),
    frame_id    INTEGER NOT NULL REFERENCES frames(id),
    flag        TEXT    NOT NULL,
    value       REAL,
    limit_value REAL,
    message     TEXT    NOT NULL
);
CREATE INDEX analysis_flags_by_frame ON analysis_flags (analysis_id, frame_id);

-- stacks
-- The page of a multi-page file read as a stack (`[watch] stacks`), from 0:
-- each page is its own frame, identified by file and page (its size_bytes is
-- the end of the page's bytes, its mtime_ns 0: both fixed once the page is
-- written). NULL for a whole file.
ALTER TABLE frames ADD COLUMN page INTEGER;

-- alert deliveries
-- One row per alert event and configured sink, written in the transaction that
-- stores the event; `finished_at_ms` is set once the sink has delivered it
-- (`error` NULL) or given up (`error` says why). A row still unfinished when
-- the service stops (cut short by the shutdown, still queued, or the process
-- killed) is sent again at the next start.
CREATE TABLE alert_deliveries (
    id             INTEGER PRIMARY KEY,
    alert_id       INTEGER REFERENCES alerts(id) ON DELETE CASCADE,
    sink           TEXT    NOT NULL,  -- command, webhook or file
    event          TEXT    NOT NULL,  -- the JSON document the sink receives
    queued_at_ms   INTEGER NOT NULL,
    finished_at_ms INTEGER,
    error          TEXT
);
CREATE INDEX alert_deliveries_unfinished ON alert_deliveries (id) WHERE finished_at_ms IS NULL;
