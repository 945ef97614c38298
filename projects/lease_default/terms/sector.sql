-- Terms marking the firm's sector; retail, logistics and manufacturing together are the reference group.
SELECT
  -- 1 for construction firms: project-based revenue that can stop between contracts.
  CASE WHEN sector = 'construction' THEN 1 ELSE 0 END AS sector_construction,
  -- 1 for food service firms: thin margins and high turnover of businesses.
  CASE WHEN sector = 'food_service' THEN 1 ELSE 0 END AS sector_food_service,
  -- 1 for health practices: steady, largely contracted revenue.
  CASE WHEN sector = 'health' THEN 1 ELSE 0 END AS sector_health
FROM leases
