-- Terms describing the vehicle itself: its class and its age.
SELECT
  -- 1 for heavy trucks, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'heavy_truck' THEN 1 ELSE 0 END AS heavy_truck,
  -- 1 for light trucks, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'light_truck' THEN 1 ELSE 0 END AS light_truck,
  -- Vehicle age in years as a restricted cubic spline with four knots learned from the training
  -- rows: wear adds claims in the early years, then levels off, a curve no single slope follows.
  -- A missing age stays missing.
  SPLINE(vehicle_age_years, 4) AS vehicle_age_curve
FROM vehicle_years
