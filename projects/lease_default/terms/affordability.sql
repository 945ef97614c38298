-- Terms describing how affordable the lease is for the firm: payment against revenue, firm age, size.
SELECT
  -- Share of the firm's monthly revenue that the lease payment takes (0.10 means a tenth of revenue).
  -- NULL when revenue was not reported or is recorded as zero, so such leases are dropped, not guessed.
  monthly_payment / NULLIF(monthly_revenue, 0) AS payment_to_revenue,
  -- 1 for firms younger than two years when the lease started (start-ups), else 0.
  CASE WHEN firm_age_years < 2 THEN 1 ELSE 0 END AS young_firm,
  -- The payment share again, but only for start-ups (0 for older firms): how much steeper the risk of a
  -- stretched payment is when the firm has no track record. Read together with payment_to_revenue
  -- and young_firm.
  payment_to_revenue * young_firm AS young_and_stretched,
  -- Natural log of monthly revenue, a measure of firm size; a step of 0.693 is a doubling of revenue.
  -- NULL when revenue is missing or zero.
  LN(CASE WHEN monthly_revenue > 0 THEN monthly_revenue END) AS log_revenue
FROM leases
