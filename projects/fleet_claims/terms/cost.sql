-- Terms describing one claim, for the cost of a claim.
SELECT
  -- 1 for a claim on a heavy truck, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'heavy_truck' THEN 1 ELSE 0 END AS heavy_truck_claim,
  -- 1 for a claim on a light truck, else 0; vans are the reference class.
  CASE WHEN vehicle_class = 'light_truck' THEN 1 ELSE 0 END AS light_truck_claim,
  -- Vehicle age in years at the claim, capped at 12 as for the claim frequency.
  CASE WHEN vehicle_age_years > 12 THEN 12 ELSE vehicle_age_years END AS claim_vehicle_age,
  -- 1 for a claim whose event happened at night (22:00 to 06:00), else 0.
  CASE WHEN at_night THEN 1 ELSE 0 END AS night_claim
FROM claim_costs
