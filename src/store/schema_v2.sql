-- framewarden schema, version 2: quality control of the run.

-- An alert is one episode of a condition: opened (raised_at_ms), closed when
-- the condition clears (closed_at_ms, NULL while open).
ALTER TABLE alerts ADD COLUMN closed_at_ms INTEGER;
ALTER TABLE alerts ADD COLUMN closed_message TEXT;
-- The file that triggered it, also when no frame row exists for it.
ALTER TABLE alerts ADD COLUMN file TEXT;
CREATE INDEX alerts_open ON alerts (run_id, kind, closed_at_ms);

-- Remedy for uneven illumination: the frame segmented again after flattening
-- the background; count_source says which result the count comes from.
ALTER TABLE frames ADD COLUMN flat_threshold REAL;
ALTER TABLE frames ADD COLUMN flat_object_count INTEGER;
ALTER TABLE frames ADD COLUMN count_source TEXT;
