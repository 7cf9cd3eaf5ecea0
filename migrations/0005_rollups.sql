-- Per-channel rollups of readings on fixed tiers (10 s, 1 min, 1 h), each
-- bucket on a whole multiple of its width since the epoch. Written in the
-- same transaction as the readings they summarise; a bucket is always
-- recomputed whole (from the readings for 10 s, from the tier below for
-- the others), so late and resent readings leave it exact.
-- Sums, not means, so buckets merge; `last_*` belong to the reading with
-- the latest time (the highest seq among equal times).
CREATE TABLE rollups (
    channel_key INTEGER NOT NULL,
    width_s     INTEGER NOT NULL,
    start_ns    INTEGER NOT NULL,
    run_id      INTEGER NOT NULL,
    n           INTEGER NOT NULL,
    last_ns     INTEGER NOT NULL,
    v_min REAL NOT NULL, v_max REAL NOT NULL, v_sum REAL NOT NULL, v_last REAL NOT NULL,
    s_n INTEGER NOT NULL, s_min REAL, s_max REAL, s_sum REAL, s_last REAL,
    e_min REAL NOT NULL, e_max REAL NOT NULL, e_sum REAL NOT NULL, e_last REAL NOT NULL,
    PRIMARY KEY (channel_key, width_s, start_ns)
) WITHOUT ROWID;

-- Readings stored before this migration, summarised once.
INSERT INTO rollups
WITH agg AS (
    SELECT channel_key AS k, (time_ns / 10000000000) * 10000000000 AS b,
           COUNT(*) AS n, MAX(time_ns) AS last_ns,
           MIN(volts) AS v_min, MAX(volts) AS v_max, SUM(volts) AS v_sum,
           COUNT(soc_fused) AS s_n, MIN(soc_fused) AS s_min, MAX(soc_fused) AS s_max, SUM(soc_fused) AS s_sum,
           MIN(cell_volts_used) AS e_min, MAX(cell_volts_used) AS e_max, SUM(cell_volts_used) AS e_sum
    FROM readings WHERE time_ns >= 0 GROUP BY channel_key, b
), tagged AS (
    SELECT agg.*, (SELECT seq FROM readings r WHERE r.channel_key = agg.k AND r.time_ns = agg.last_ns
                   ORDER BY seq DESC LIMIT 1) AS last_seq
    FROM agg
)
SELECT t.k, 10, t.b, r.run_id, t.n, t.last_ns, t.v_min, t.v_max, t.v_sum, r.volts,
       t.s_n, t.s_min, t.s_max, t.s_sum, r.soc_fused, t.e_min, t.e_max, t.e_sum, r.cell_volts_used
FROM tagged t JOIN readings r ON r.channel_key = t.k AND r.seq = t.last_seq;

INSERT INTO rollups
WITH agg AS (
    SELECT channel_key AS k, (start_ns / 60000000000) * 60000000000 AS b, SUM(n) AS n, MAX(last_ns) AS last_ns,
           MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum,
           SUM(s_n) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum,
           MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum
    FROM rollups WHERE width_s = 10 GROUP BY channel_key, b
)
SELECT a.k, 60, a.b, c.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, c.v_last,
       a.s_n, a.s_min, a.s_max, a.s_sum, c.s_last, a.e_min, a.e_max, a.e_sum, c.e_last
FROM agg a JOIN rollups c ON c.channel_key = a.k AND c.width_s = 10
    AND c.start_ns >= a.b AND c.start_ns < a.b + 60000000000 AND c.last_ns = a.last_ns;

INSERT INTO rollups
WITH agg AS (
    SELECT channel_key AS k, (start_ns / 3600000000000) * 3600000000000 AS b, SUM(n) AS n, MAX(last_ns) AS last_ns,
           MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum,
           SUM(s_n) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum,
           MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum
    FROM rollups WHERE width_s = 60 GROUP BY channel_key, b
)
SELECT a.k, 3600, a.b, c.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, c.v_last,
       a.s_n, a.s_min, a.s_max, a.s_sum, c.s_last, a.e_min, a.e_max, a.e_sum, c.e_last
FROM agg a JOIN rollups c ON c.channel_key = a.k AND c.width_s = 60
    AND c.start_ns >= a.b AND c.start_ns < a.b + 3600000000000 AND c.last_ns = a.last_ns;
