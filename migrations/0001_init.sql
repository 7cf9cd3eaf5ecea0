-- gibbsline schema v1. Plain SQL with few SQLite-isms (WITHOUT ROWID) so a
-- PostgreSQL store can follow the same shape.

CREATE TABLE chemistries (
    chemistry_id TEXT PRIMARY KEY NOT NULL,
    spec_json    TEXT NOT NULL,
    updated_ns   INTEGER NOT NULL
);

CREATE TABLE channels (
    channel_key    INTEGER PRIMARY KEY,
    channel_id     TEXT NOT NULL UNIQUE,
    definition_json TEXT NOT NULL,
    rules_json     TEXT,
    current_run_id INTEGER NOT NULL,
    updated_ns     INTEGER NOT NULL
);

-- A run fixes the definition readings were computed with.
CREATE TABLE runs (
    run_id        INTEGER PRIMARY KEY,
    channel_key   INTEGER NOT NULL REFERENCES channels(channel_key),
    started_ns    INTEGER NOT NULL,
    chemistry_id  TEXT NOT NULL,
    n_electrons   INTEGER NOT NULL,
    e_standard_298_v REAL NOT NULL,
    de_dt_v_per_k REAL NOT NULL,
    cells_in_series INTEGER NOT NULL,
    default_temp_c REAL NOT NULL,
    equilibrium_tolerance_v REAL NOT NULL,
    soc_model     TEXT NOT NULL
);

-- One row per reading. Values that follow cheaply from the stored ones and
-- the run (ΔG, ln Q, log10 K, state) are recomputed at query time.
-- flags: 1 out of order, 2 SOC clamped, 4 resting, 8 rest settled,
--        16/32 OCV source (16 = V − I·R, 32 = counted SOC), 64 gap before.
CREATE TABLE readings (
    channel_key INTEGER NOT NULL,
    seq         INTEGER NOT NULL,
    run_id      INTEGER NOT NULL,
    time_ns     INTEGER NOT NULL,
    volts       REAL NOT NULL,
    amps        REAL,
    temp_c      REAL,
    cell_volts_used REAL NOT NULL,
    soc_model   REAL,
    soc_fused   REAL,
    charge_ah   REAL NOT NULL,
    energy_wh   REAL NOT NULL,
    flags       INTEGER NOT NULL,
    PRIMARY KEY (channel_key, seq)
) WITHOUT ROWID;

CREATE INDEX readings_by_time ON readings (channel_key, time_ns);

CREATE TABLE estimator_state (
    channel_key INTEGER PRIMARY KEY NOT NULL,
    run_id      INTEGER NOT NULL,
    last_seq    INTEGER NOT NULL,
    last_time_ns INTEGER NOT NULL,
    usual_interval_s REAL NOT NULL,
    state_json  TEXT NOT NULL
);

CREATE TABLE alerts (
    alert_id     INTEGER PRIMARY KEY,
    channel_key  INTEGER NOT NULL,
    run_id       INTEGER NOT NULL,
    kind         INTEGER NOT NULL,
    severity     INTEGER NOT NULL,
    raised_ns    INTEGER NOT NULL,
    raised_seq   INTEGER NOT NULL,
    trigger_value REAL,
    threshold    REAL NOT NULL,
    unit         TEXT NOT NULL,
    message      TEXT NOT NULL,
    seconds_to_target REAL,
    cleared_ns   INTEGER,
    ack_by       TEXT,
    ack_ns       INTEGER,
    ack_note     TEXT
);

CREATE INDEX alerts_active ON alerts (channel_key, kind) WHERE cleared_ns IS NULL;

-- Every raise, clear and acknowledgement, in commit order: WatchAlerts
-- resumes from an event id, so a reconnecting subscriber misses nothing.
CREATE TABLE alert_events (
    event_id   INTEGER PRIMARY KEY,
    alert_id   INTEGER NOT NULL,
    event_kind INTEGER NOT NULL,
    time_ns    INTEGER NOT NULL
);

CREATE TABLE cycles (
    channel_key INTEGER NOT NULL,
    run_id      INTEGER NOT NULL,
    cycle_index INTEGER NOT NULL,
    record_json TEXT NOT NULL,
    PRIMARY KEY (channel_key, run_id, cycle_index)
);
