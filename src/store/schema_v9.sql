-- framewarden schema, version 9.

-- dim objects
-- Objects the threshold left out: a second, dimmer population below the
-- frame's threshold (analysis::dim_objects). NULL in rows from before v9.
ALTER TABLE frames ADD COLUMN dim_objects INTEGER;
ALTER TABLE frames ADD COLUMN dim_level REAL;           -- NULL: no second population
ALTER TABLE analysis_frames ADD COLUMN dim_objects INTEGER;
ALTER TABLE analysis_frames ADD COLUMN dim_level REAL;
