-- The coulomb count before clamping to [0, 1] (NULL while SOC is unknown:
-- not yet anchored at a rest, a known resistance or an operator's entry).
ALTER TABLE readings ADD COLUMN soc_counted_unclamped REAL;

-- What operators did to a channel's state (an entered SOC, a reset
-- timeline), kept beside the readings it changed.
CREATE TABLE operator_events (
    event_key   INTEGER PRIMARY KEY,
    channel_key INTEGER NOT NULL REFERENCES channels(channel_key),
    run_id      INTEGER NOT NULL,
    time_ns     INTEGER NOT NULL,
    kind        TEXT NOT NULL,
    by_name     TEXT NOT NULL,
    detail_json TEXT NOT NULL
);
CREATE INDEX operator_events_by_channel ON operator_events (channel_key, time_ns);
