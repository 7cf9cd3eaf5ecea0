-- Where each channel's kept history begins (see src/retention.rs): raw
-- readings before raw_before_ns and 10 s / 1 min rollups before
-- rollup_before_ns are deleted by the pruning task, and readings stamped
-- before raw_before_ns are refused. Marks only rise; a channel without a
-- row has nothing pruned.
CREATE TABLE retention_marks (
    channel_key      INTEGER PRIMARY KEY NOT NULL REFERENCES channels(channel_key),
    raw_before_ns    INTEGER NOT NULL,
    rollup_before_ns INTEGER NOT NULL
);
