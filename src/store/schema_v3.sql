-- framewarden schema, version 3: Sarle's bimodality coefficient of each frame's
-- histogram, beside Otsu's separability (NULL for frames recorded before).
ALTER TABLE frames ADD COLUMN bimodality REAL;
