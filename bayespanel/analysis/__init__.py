"""The analysis layer: variance partition, contrasts, LOO, comparison, prior
sensitivity, the design check and occasion effects."""
