-- framewarden schema, version 1. Times are *_at_ms: milliseconds since the Unix epoch (UTC).

-- A run is one acquisition being watched, not one process: a restart continues it.
CREATE TABLE runs (
    id              INTEGER PRIMARY KEY,
    folders         TEXT    NOT NULL,            -- JSON array of watched folders
    started_at_ms   INTEGER NOT NULL,
    ended_at_ms     INTEGER,                     -- set on a clean stop, cleared when continued
    last_frame_at_ms INTEGER NOT NULL,           -- last frame detected; drives the idle gap
    settings        TEXT    NOT NULL             -- snapshot of the settings in force
);

-- One row per version of a file (path + size + mtime), from "judged complete" on.
CREATE TABLE frames (
    id                  INTEGER PRIMARY KEY,
    run_id              INTEGER NOT NULL REFERENCES runs(id),
    path                TEXT    NOT NULL,
    size_bytes          INTEGER NOT NULL,
    mtime_ns            INTEGER NOT NULL,
    version             INTEGER NOT NULL,        -- 1, then +1 for each rewrite of the same path
    status              TEXT    NOT NULL CHECK (status IN ('queued', 'done', 'failed')),
    error               TEXT,
    attempts            INTEGER NOT NULL DEFAULT 0,
    detected_at_ms      INTEGER NOT NULL,        -- first event or scan that saw the file
    ready_at_ms         INTEGER NOT NULL,        -- judged completely written
    analysed_at_ms      INTEGER,                 -- row committed as done or failed
    latency_ms          INTEGER,                 -- ready -> committed
    -- parts of the file name (configurable pattern)
    well                TEXT,
    site                TEXT,
    time_point          TEXT,
    channel             TEXT,
    name_parts          TEXT,                    -- JSON object of every named part
    -- per-frame measures from the analysis
    width               INTEGER,
    height              INTEGER,
    bit_depth           INTEGER,
    method              TEXT,
    threshold           REAL,
    separability        REAL,
    object_count        INTEGER,
    foreground_fraction REAL,
    background_level    REAL,
    saturation_fraction REAL,
    focus               REAL,
    illumination_change REAL,
    pixel_size_um       REAL,
    pixel_size_source   TEXT,
    UNIQUE (path, size_bytes, mtime_ns)
);
CREATE INDEX frames_by_run_status ON frames (run_id, status);
CREATE INDEX frames_by_run_analysed ON frames (run_id, analysed_at_ms);
CREATE INDEX frames_by_well_time ON frames (well, time_point);

CREATE TABLE objects (
    frame_id             INTEGER NOT NULL REFERENCES frames(id) ON DELETE CASCADE,
    label                INTEGER NOT NULL,
    area_px              INTEGER NOT NULL,
    area_um2             REAL,
    centroid_x           REAL NOT NULL,
    centroid_y           REAL NOT NULL,
    bbox_x_min           INTEGER NOT NULL,
    bbox_y_min           INTEGER NOT NULL,
    bbox_x_max           INTEGER NOT NULL,       -- exclusive
    bbox_y_max           INTEGER NOT NULL,       -- exclusive
    mean_intensity       REAL NOT NULL,
    integrated_intensity REAL NOT NULL,
    max_intensity        REAL NOT NULL,
    perimeter_px         REAL NOT NULL,
    circularity          REAL NOT NULL,
    major_axis_px        REAL NOT NULL,
    minor_axis_px        REAL NOT NULL,
    eccentricity         REAL NOT NULL,
    channels             TEXT,                   -- JSON array of per-page intensities
    PRIMARY KEY (frame_id, label)
) WITHOUT ROWID;

-- Filled by frame quality checks: each flag keeps its evidence.
CREATE TABLE flags (
    id          INTEGER PRIMARY KEY,
    frame_id    INTEGER NOT NULL REFERENCES frames(id) ON DELETE CASCADE,
    kind        TEXT    NOT NULL,
    value       REAL,
    limit_value REAL,
    message     TEXT    NOT NULL
);
CREATE INDEX flags_by_frame ON flags (frame_id);

-- Filled by the run monitor: alerts raised during a run.
CREATE TABLE alerts (
    id          INTEGER PRIMARY KEY,
    run_id      INTEGER NOT NULL REFERENCES runs(id),
    raised_at_ms INTEGER NOT NULL,
    kind        TEXT    NOT NULL,
    message     TEXT    NOT NULL,
    frame_id    INTEGER REFERENCES frames(id),
    delivered_at_ms INTEGER
);
CREATE INDEX alerts_by_run ON alerts (run_id);
