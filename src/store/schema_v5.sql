-- framewarden schema, version 5: how many times the service stopped uncleanly
-- (crash, kill, a hang ended by the watchdog) while a frame was queued or in
-- hand. A frame interrupted too often is recorded as failed, so that one file
-- that crashes or hangs the analysis cannot stop the run.
ALTER TABLE frames ADD COLUMN interruptions INTEGER NOT NULL DEFAULT 0;
