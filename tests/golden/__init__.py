"""Kept outputs that structural changes must reproduce (see compare_results)."""
