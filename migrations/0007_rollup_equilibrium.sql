-- Rollups rebuilt with what a bucket owes a dashboard beyond volts and SOC:
-- - e_*: per-cell equilibrium voltage (so ΔG) over the readings that have
--   an open-circuit estimate only. Before, readings under current without
--   one (flags & 4096) counted with their terminal voltage, the very value
--   each reading refuses to show as ΔG.
-- - d_*: per-cell driving force η = V/cells − E_eq over the readings that
--   have one (open circuit from V − I·R, the counted SOC or the reversible
--   voltage: flags & (16 | 32 | 2048)).
-- - c_last, w_last: the coulomb and energy counts of the last reading, so a
--   query gives charge and energy passed per bucket as differences.
-- Every tier is recomputed from the readings, as 0005 first did.
CREATE TABLE rollups_v2 (
    channel_key INTEGER NOT NULL,
    width_s     INTEGER NOT NULL,
    start_ns    INTEGER NOT NULL,
    run_id      INTEGER NOT NULL,
    n           INTEGER NOT NULL,
    last_ns     INTEGER NOT NULL,
    v_min REAL NOT NULL, v_max REAL NOT NULL, v_sum REAL NOT NULL, v_last REAL NOT NULL,
    s_n INTEGER NOT NULL, s_min REAL, s_max REAL, s_sum REAL, s_last REAL,
    e_n INTEGER NOT NULL, e_min REAL, e_max REAL, e_sum REAL, e_last REAL,
    d_n INTEGER NOT NULL, d_min REAL, d_max REAL, d_sum REAL, d_last REAL,
    c_last REAL NOT NULL, w_last REAL NOT NULL,
    PRIMARY KEY (channel_key, width_s, start_ns)
) WITHOUT ROWID;

INSERT INTO rollups_v2
WITH agg AS (
    SELECT k, (time_ns / 10000000000) * 10000000000 AS b,
           COUNT(*) AS n, MAX(time_ns) AS last_ns,
           MIN(volts) AS v_min, MAX(volts) AS v_max, SUM(volts) AS v_sum,
           COUNT(soc) AS s_n, MIN(soc) AS s_min, MAX(soc) AS s_max, SUM(soc) AS s_sum,
           COUNT(e) AS e_n, MIN(e) AS e_min, MAX(e) AS e_max, SUM(e) AS e_sum,
           COUNT(d) AS d_n, MIN(d) AS d_min, MAX(d) AS d_max, SUM(d) AS d_sum
    FROM (
        SELECT r.channel_key AS k, r.time_ns, r.volts, r.soc_fused AS soc,
               CASE WHEN r.flags & 4096 = 0 THEN r.cell_volts_used END AS e,
               CASE WHEN r.flags & 2096 != 0 THEN r.volts / u.cells_in_series - r.cell_volts_used END AS d
        FROM readings r JOIN runs u ON u.run_id = r.run_id WHERE r.time_ns >= 0
    ) GROUP BY k, b
)
-- CROSS JOIN keeps the buckets outside: each finds its last reading by
-- the time index.
SELECT a.k, 10, a.b, l.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, l.volts,
       a.s_n, a.s_min, a.s_max, a.s_sum, l.soc_fused,
       a.e_n, a.e_min, a.e_max, a.e_sum, CASE WHEN l.flags & 4096 = 0 THEN l.cell_volts_used END,
       a.d_n, a.d_min, a.d_max, a.d_sum,
       CASE WHEN l.flags & 2096 != 0 THEN l.volts / lu.cells_in_series - l.cell_volts_used END,
       l.charge_ah, l.energy_wh
FROM agg a
CROSS JOIN readings l ON l.channel_key = a.k AND l.seq = (
    SELECT seq FROM readings x WHERE x.channel_key = a.k AND x.time_ns = a.last_ns
    ORDER BY seq DESC LIMIT 1)
CROSS JOIN runs lu ON lu.run_id = l.run_id;

INSERT INTO rollups_v2
WITH agg AS (
    SELECT channel_key AS k, (start_ns / 60000000000) * 60000000000 AS b, SUM(n) AS n, MAX(last_ns) AS last_ns,
           MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum,
           SUM(s_n) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum,
           SUM(e_n) AS e_n, MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum,
           SUM(d_n) AS d_n, MIN(d_min) AS d_min, MAX(d_max) AS d_max, SUM(d_sum) AS d_sum
    FROM rollups_v2 WHERE width_s = 10 GROUP BY channel_key, b
)
SELECT a.k, 60, a.b, c.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, c.v_last,
       a.s_n, a.s_min, a.s_max, a.s_sum, c.s_last, a.e_n, a.e_min, a.e_max, a.e_sum, c.e_last,
       a.d_n, a.d_min, a.d_max, a.d_sum, c.d_last, c.c_last, c.w_last
FROM agg a CROSS JOIN rollups_v2 c ON c.channel_key = a.k AND c.width_s = 10
    AND c.start_ns >= a.b AND c.start_ns < a.b + 60000000000 AND c.last_ns = a.last_ns;

INSERT INTO rollups_v2
WITH agg AS (
    SELECT channel_key AS k, (start_ns / 3600000000000) * 3600000000000 AS b, SUM(n) AS n, MAX(last_ns) AS last_ns,
           MIN(v_min) AS v_min, MAX(v_max) AS v_max, SUM(v_sum) AS v_sum,
           SUM(s_n) AS s_n, MIN(s_min) AS s_min, MAX(s_max) AS s_max, SUM(s_sum) AS s_sum,
           SUM(e_n) AS e_n, MIN(e_min) AS e_min, MAX(e_max) AS e_max, SUM(e_sum) AS e_sum,
           SUM(d_n) AS d_n, MIN(d_min) AS d_min, MAX(d_max) AS d_max, SUM(d_sum) AS d_sum
    FROM rollups_v2 WHERE width_s = 60 GROUP BY channel_key, b
)
SELECT a.k, 3600, a.b, c.run_id, a.n, a.last_ns, a.v_min, a.v_max, a.v_sum, c.v_last,
       a.s_n, a.s_min, a.s_max, a.s_sum, c.s_last, a.e_n, a.e_min, a.e_max, a.e_sum, c.e_last,
       a.d_n, a.d_min, a.d_max, a.d_sum, c.d_last, c.c_last, c.w_last
FROM agg a CROSS JOIN rollups_v2 c ON c.channel_key = a.k AND c.width_s = 60
    AND c.start_ns >= a.b AND c.start_ns < a.b + 3600000000000 AND c.last_ns = a.last_ns;

DROP TABLE rollups;
ALTER TABLE rollups_v2 RENAME TO rollups;
