-- framewarden schema, version 4: the objects of both results of a flattened
-- frame. `result` is 'raw' (the segmentation as configured) or 'flattened'
-- (segmented again after rolling-ball flattening, see frames.count_source).
-- The objects the frame's count comes from: result = COALESCE(count_source, 'raw').
CREATE TABLE objects_v4 (
    frame_id             INTEGER NOT NULL REFERENCES frames(id) ON DELETE CASCADE,
    result               TEXT    NOT NULL DEFAULT 'raw' CHECK (result IN ('raw', 'flattened')),
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
    PRIMARY KEY (frame_id, result, label)
) WITHOUT ROWID;
INSERT INTO objects_v4 (frame_id, result, label, area_px, area_um2, centroid_x, centroid_y,
        bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
        max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity, channels)
    SELECT frame_id, 'raw', label, area_px, area_um2, centroid_x, centroid_y,
        bbox_x_min, bbox_y_min, bbox_x_max, bbox_y_max, mean_intensity, integrated_intensity,
        max_intensity, perimeter_px, circularity, major_axis_px, minor_axis_px, eccentricity, channels
    FROM objects;
DROP TABLE objects;
ALTER TABLE objects_v4 RENAME TO objects;
