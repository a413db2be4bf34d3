-- framewarden schema, version 7: whether a worker has a queued frame in hand
-- (being analyzed) rather than waiting in the queue. An unclean stop counts an
-- interruption only for frames in hand: a frame that was only waiting was not
-- what stopped the service, and must not be recorded as failed for it.
ALTER TABLE frames ADD COLUMN in_hand INTEGER NOT NULL DEFAULT 0 CHECK (in_hand IN (0, 1));
