-- Webhook deliveries: one row per event and receiver URL, written when the daemon sees the event
-- and updated after each attempt, so a restart loses none (pending rows are picked up at start).
-- `body` is the JSON sent, fixed when the event is recorded; only the timestamp and signature
-- headers change from one attempt to the next. The secret is never stored: it comes from the
-- configuration by URL at send time. Portable SQL (SQLite and PostgreSQL).
CREATE TABLE webhook_deliveries (
    id INTEGER PRIMARY KEY,
    event_id TEXT NOT NULL,
    event_type TEXT NOT NULL,
    url TEXT NOT NULL,
    body TEXT NOT NULL,
    state TEXT NOT NULL CHECK (state IN ('pending', 'delivered', 'failed')),
    attempts INTEGER NOT NULL DEFAULT 0,
    next_attempt_at_unix_ms BIGINT NOT NULL,
    last_error TEXT,
    created_at_unix_ms BIGINT NOT NULL,
    delivered_at_unix_ms BIGINT,
    UNIQUE (event_id, url)
);

CREATE INDEX webhook_deliveries_due ON webhook_deliveries (state, next_attempt_at_unix_ms);
