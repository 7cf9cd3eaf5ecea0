-- Alerts raised by imported recordings: stored and listed, never pushed
-- to live subscribers or notify targets.
ALTER TABLE alerts ADD COLUMN historical INTEGER NOT NULL DEFAULT 0;
