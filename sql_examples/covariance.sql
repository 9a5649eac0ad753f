-- Sample covariances (divisor rows - 1) from the Gram matrix of the basis columns, each with a
-- hard bound on |true covariance - value|.
-- Placeholder: {archive} an archive of table sites (key id; key column site).
SELECT column_a, column_b, value, bound
FROM rankfold_covariance('{archive}', ['v1', 'v3', 'v8'])
ORDER BY column_a, column_b;
