"""The exact solver: the Cholesky fit on every row, closed-form leave-one-out and k-fold
residuals, and one tuning candidate scored along the ridge grid."""
