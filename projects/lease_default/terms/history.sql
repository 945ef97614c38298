-- Terms describing the firm's payment history on earlier leases with the lessor.
SELECT
  -- 1 when the firm has paid late at least once before, else 0.
  CASE WHEN past_late_payments > 0 THEN 1 ELSE 0 END AS any_late_payment,
  -- Count of earlier late payments, capped at three: beyond three, more late payments add little.
  -- The ledger always records a count (0 when none); a missing count stays missing (featpipe's LEAST
  -- is NULL when an argument is NULL).
  LEAST(past_late_payments, 3) AS late_payments_capped,
  -- 1 for firms with three or more earlier late payments (repeat late payers), else 0.
  CASE WHEN past_late_payments >= 3 THEN 1 ELSE 0 END AS repeat_late_payer
FROM leases
