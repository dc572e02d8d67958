"""kridge trainer: load tabular data, fit kernel ridge regression, publish a versioned bundle."""
