"""The kept-results comparison notices what it exists to notice (tests/golden/compare.py)."""

import copy
import json

from golden.compare import KEPT, compare


def test_the_comparison_finds_a_changed_reference_number_a_label_and_a_lost_entry():
    kept = json.loads(KEPT.read_text("utf-8"))
    assert compare(copy.deepcopy(kept), kept, strict=True) == []
    new = copy.deepcopy(kept)
    row = new["reference"][0]["coefficients"][1]
    row["estimate"] *= 1 + 1e-7
    new["reference"][1]["title"] += " (renamed)"
    del new["models"][0]["loo"]
    diff = compare(new, kept, strict=False)
    assert any(d.startswith("reference/0/coefficients/1/estimate") for d in diff)
    assert any(d.startswith("reference/1/title") for d in diff)
    assert any(d.startswith("missing: models/0/loo") for d in diff)


def test_the_closed_form_tolerance_is_the_standard_librarys_isclose():
    # Outside reference: math.isclose(rel_tol=1e-9, abs_tol=1e-12) from the standard
    # library decides, for each changed reference estimate, whether compare() reports it.
    import math

    kept = json.loads(KEPT.read_text("utf-8"))
    for factor in (1 + 1e-11, 1 + 5e-10, 1 + 2e-9, 1 + 1e-6):
        new = copy.deepcopy(kept)
        row = new["reference"][0]["coefficients"][1]
        old = row["estimate"]
        row["estimate"] = old * factor
        expected = not math.isclose(row["estimate"], old, rel_tol=1e-9, abs_tol=1e-12)
        assert bool(compare(new, kept, strict=False)) == expected, factor


def test_bayesian_means_move_by_half_an_sd_at_most_unless_strict():
    kept = json.loads(KEPT.read_text("utf-8"))
    new = copy.deepcopy(kept)
    row = next(c for c in new["models"][1]["coefficients"] if "sd" in c and "estimate" in c)
    row["estimate"] += 0.2 * row["sd"]
    assert compare(new, kept, strict=False) == []
    assert compare(new, kept, strict=True) != []
    row["estimate"] += 0.4 * row["sd"]
    assert compare(new, kept, strict=False) != []
