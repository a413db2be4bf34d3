-- framewarden schema, version 7: frames in acquisition order, and re-saved
-- files counted once.

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
