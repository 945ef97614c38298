-- Terms describing the vehicle itself: its class and its age.
SELECT
  -- 1 for heavy trucks, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'heavy_truck' THEN 1 ELSE 0 END AS heavy_truck,
  -- 1 for light trucks, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'light_truck' THEN 1 ELSE 0 END AS light_truck,
  -- Vehicle age in years, capped at 12: wear adds claims in the early years, then levels off.
  -- A missing age stays missing (CASE gives NULL when the comparison is NULL and ELSE reads NULL).
  CASE WHEN vehicle_age_years > 12 THEN 12 ELSE vehicle_age_years END AS vehicle_age_capped
FROM vehicle_years
