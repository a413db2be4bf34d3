-- framewarden schema, version 8.

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
