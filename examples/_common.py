"""Small helpers shared by the example scripts (draws from the environment for tests)."""

import os


def sampling(default_draws: int = 1000) -> dict:
    """Sampling settings; ``BAYESPANEL_EXAMPLE_DRAWS`` shrinks them (the tests use it)."""
    draws = int(os.environ.get("BAYESPANEL_EXAMPLE_DRAWS", default_draws))
    return {"draws": draws, "tune": draws, "chains": 2 if draws < 500 else 4, "seed": 11,
            "progress": False}
