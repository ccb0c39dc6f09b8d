"""The core layer: errors, term labels, sufficient statistics, densities, shared
mathematics, linear algebra, safe text, budgets and output folders (numpy and scipy at
most; nothing of the package above)."""
