-- Readings as compressed chunks (src/store/codec.rs): each writer commit
-- stores a channel's batch as one chunk, and small chunks are merged in
-- the background. A chunk never spans an hour boundary, so retention's
-- whole-hour marks delete whole chunks, and a time range's chunks start
-- at most an hour before it. Readings stored before this migration are
-- moved into chunks when a server first opens the file (store/chunks.rs,
-- `adopt_rows`); the readings table stays, empty.
CREATE TABLE chunks (
    chunk_id    INTEGER PRIMARY KEY,
    channel_key INTEGER NOT NULL,
    first_seq   INTEGER NOT NULL,
    last_seq    INTEGER NOT NULL,
    start_ns    INTEGER NOT NULL,
    end_ns      INTEGER NOT NULL,
    n           INTEGER NOT NULL,
    body        BLOB NOT NULL
);

CREATE INDEX chunks_by_time ON chunks (channel_key, start_ns);
CREATE INDEX chunks_by_seq ON chunks (channel_key, last_seq);
-- Chunks small enough to merge (chunks::SMALL_ROWS).
CREATE INDEX chunks_small ON chunks (channel_key, start_ns) WHERE n < 256;
