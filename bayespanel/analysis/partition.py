"""Variance partition: unit and occasion SDs, ICC, quasi-demeaning shares and explained
variance at each level (Rights and Sterba 2019).

The code lives in :mod:`bayespanel.bayes.partition`, beside the posterior whose
``variance_partition()`` computes it (the bayes layer may not import the analysis layer);
this module keeps the analysis layer's public path of the same names.
"""

from ..bayes.partition import (  # noqa: F401 (public here)
    PARTITION_KINDS,
    PartitionResult,
    coefficient_parts,
    design_columns,
    design_partition,
    partition_draws,
    partition_from_stats,
    reference_partition,
    summarise_draws,
    variance_partition,
)

__all__ = ["PartitionResult", "coefficient_parts", "partition_draws", "partition_from_stats",
           "variance_partition", "design_partition", "reference_partition", "summarise_draws",
           "design_columns", "PARTITION_KINDS"]
