-- The whole channel definition a run was computed with (gas conditions,
-- active area, efficiencies), so history is recomputed with what held
-- then. NULL for runs started before this migration.
ALTER TABLE runs ADD COLUMN definition_json TEXT;
