-- The firm's sector, learned from the training leases: one indicator per sector with at least 100
-- training leases, against the most frequent sector (the reference). Construction (project-based
-- revenue that can stop between contracts) and food service (thin margins, high turnover of
-- businesses) are expected above it, health practices (steady, largely contracted revenue) below.
SELECT
  -- The firm's sector; a sector never seen in training gets no prediction (status `unseen: sector_level`).
  LEVELS(sector, 100) AS sector_level
FROM leases
