-- Terms describing how hard and when the vehicle is driven.
SELECT
  -- Thousands of kilometres a year per assigned driver: how much each driver is at the wheel.
  -- NULL if no driver is recorded.
  annual_km / NULLIF(drivers, 0) / 1000.0 AS km_per_driver,
  -- Share of the vehicle's kilometres driven at night (22:00 to 06:00), from 0 to 1.
  -- NULL if the vehicle recorded no kilometres.
  night_km / NULLIF(annual_km, 0) AS night_share,
  -- The night share again, but only for heavy trucks (0 for other classes): how much more a heavy
  -- truck's night driving adds to its claim rate. Read together with night_share and heavy_truck.
  night_share * heavy_truck AS heavy_night_share
FROM vehicle_years
