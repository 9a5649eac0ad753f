-- Pearson correlations from the c x c Gram matrix of the basis columns, with a hard bound on
-- |true correlation - value| (rankfold_covariance gives covariances the same way).
-- Placeholder: {archive} an archive of table sites (key id; key column site).
SELECT column_a, column_b, value, bound
FROM rankfold_correlation('{archive}', ['v0', 'v2', 'v4', 'v6'])
ORDER BY column_a, column_b;
