"""Spot checks (formread/read/audit.py): a fixed, even draw, and an honest estimate of the error among accepted."""

import numpy as np

from formread.read.audit import apply_audit, audit_draw
from formread.read.decode import FieldReading
from formread.read.tune import clopper_pearson_upper


def test_the_draw_is_fixed_by_page_field_and_seed_and_even():
    a = [audit_draw(f"{i:064x}", "amount") for i in range(4000)]
    assert a == [audit_draw(f"{i:064x}", "amount") for i in range(4000)]          # same inputs, same draw
    assert a != [audit_draw(f"{i:064x}", "amount", seed=1) for i in range(4000)]  # the seed changes it
    assert a != [audit_draw(f"{i:064x}", "date") for i in range(4000)]            # and the field
    # uniform on [0, 1): the share under r is close to r (binomial sd for 4000 draws: under 0.008)
    for r in (0.02, 0.1, 0.5):
        assert abs(np.mean(np.array(a) < r) - r) < 4 * np.sqrt(r * (1 - r) / 4000)


def test_only_accepted_fields_are_spot_checked():
    def page():
        return {"a": FieldReading("a", "12", 0.99, decision="accepted"),
                "b": FieldReading("b", "7", 0.4, decision="review", reason="low_confidence")}

    hits = 0
    for i in range(200):
        r = page()
        sent = apply_audit(r, 0.5, f"{i:064x}")
        assert "b" not in sent and r["b"].reason == "low_confidence"
        if sent:
            assert r["a"].decision == "review" and r["a"].reason == "audit"
            hits += 1
    assert 60 < hits < 140
    r = page()
    assert apply_audit(r, 0.0, "0" * 64) == set() and r["a"].decision == "accepted"


def test_the_spot_check_bound_contains_the_true_error_at_the_stated_rate():
    """Over 40 seeded draws of a population with a known error among accepted, the one-sided 95%
    Clopper-Pearson bound from the spot-checked fields lies at or above the true error in at
    least 95% of them (checked with a margin for 40 draws; the count is printed)."""
    rng = np.random.default_rng(12)
    n = 3000
    wrong = rng.uniform(size=n) < 0.012          # the true error among accepted: about 1.2%
    hashes = [f"{h:064x}" for h in rng.integers(0, 2 ** 62, size=n)]
    true_rate = wrong.mean()
    covered = 0
    for seed in range(40):
        audited = np.array([audit_draw(h, "amount", seed) < 0.1 for h in hashes])
        k, m = int((wrong & audited).sum()), int(audited.sum())
        covered += true_rate <= clopper_pearson_upper(k, m)
    print(f"spot-check bound held in {covered} of 40 seeded draws (stated: 95%)")
    assert covered >= 36                         # P(covered <= 35 | p >= 0.95) < 0.05 for 40 draws
