-- framewarden schema, version 6: one name for each thing, the same in the
-- database, the JSON and the text; and run settings a person can read.

-- A frame's file, as `status --json` and the alert payloads call it.
ALTER TABLE frames RENAME COLUMN path TO file;
-- One spelling of "analyze", the command's, everywhere.
ALTER TABLE frames RENAME COLUMN analysed_at_ms TO analyzed_at_ms;
-- The second segmentation of an unevenly lit frame is the "recount" (it never
-- involved the flat-field correction its old name suggested).
ALTER TABLE frames RENAME COLUMN flat_threshold TO recount_threshold;
ALTER TABLE frames RENAME COLUMN flat_object_count TO recount_object_count;
UPDATE frames SET count_source = 'recount' WHERE count_source = 'flattened';
-- A flag's name and an alert's condition, as everywhere else.
ALTER TABLE flags RENAME COLUMN kind TO flag;
ALTER TABLE alerts RENAME COLUMN kind TO condition;
ALTER TABLE alerts RENAME COLUMN raised_at_ms TO opened_at_ms;

-- Components the size limits removed, per frame (NULL before v6), so that a
-- size filter never makes objects vanish silently.
ALTER TABLE frames ADD COLUMN size_filtered INTEGER;
-- Share of objects that look like touching ones merged into one (NULL before v6).
ALTER TABLE frames ADD COLUMN merged_fraction REAL;

-- Objects of the recount are result = 'recount'; each object's solidity.
CREATE TABLE objects_v6 (
    frame_id             INTEGER NOT NULL REFERENCES frames(id) ON DELETE CASCADE,
    result               TEXT    NOT NULL DEFAULT 'raw' CHECK (result IN ('raw', 'recount')),
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
    solidity             REAL,                   -- area / convex hull area; NULL before v6
    channels             TEXT,                   -- JSON array of per-page intensities
    PRIMARY KEY (frame_id, result, label)
) WITHOUT ROWID;
INSERT INTO objects_v6 (frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
        bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
        max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity, channels)
    SELECT frame_id, CASE result WHEN 'flattened' THEN 'recount' ELSE result END, label, area_px,
        area_um2, centroid_x, centroid_y, bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max,
        mean_intensity, integrated_intensity, max_intensity, perimeter_px, circularity,
        major_axis_px, minor_axis_px, eccentricity, channels
    FROM objects;
DROP TABLE objects;
ALTER TABLE objects_v6 RENAME TO objects;

-- runs.settings is TOML that loads back into the same settings ('toml'); runs
-- recorded before hold a debug listing that cannot be loaded ('listing'), with
-- its long number lists shortened by the migration.
ALTER TABLE runs ADD COLUMN settings_format TEXT NOT NULL DEFAULT 'listing'
    CHECK (settings_format IN ('toml', 'listing'));
