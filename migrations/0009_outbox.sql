-- Alert delivery (webhooks, MQTT): the targets the server was started
-- with, and one row per (target, alert event) written in the transaction
-- that writes the event, so an event is never stored without its
-- deliveries, nor delivered before it is stored.
CREATE TABLE notify_targets (
    name         TEXT PRIMARY KEY,
    kind         TEXT NOT NULL,            -- 'webhook' or 'mqtt'
    min_severity INTEGER NOT NULL,
    channels     TEXT NOT NULL             -- ',a,b,' or '' for every channel
) WITHOUT ROWID;

CREATE TABLE deliveries (
    target          TEXT NOT NULL,
    event_id        INTEGER NOT NULL,
    created_ns      INTEGER NOT NULL,
    attempts        INTEGER NOT NULL DEFAULT 0,
    next_attempt_ns INTEGER NOT NULL DEFAULT 0,
    delivered_ns    INTEGER,
    last_error      TEXT,
    PRIMARY KEY (target, event_id)
) WITHOUT ROWID;

CREATE INDEX deliveries_pending ON deliveries (target, event_id) WHERE delivered_ns IS NULL;
