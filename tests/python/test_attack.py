"""A small run of the adaptive attack (adaptive_attack.py) in CI: one seed per answer rule.

The full run (20 seeds per rule) is in the closing notes; this keeps the attack and its checks
working. Every label is a fair coin, so 0.5 is every model's true error: every interval the
daemon reports must contain it, no threshold answer may pass, and no salt of the auditor's
export may appear in anything the attacker read.
"""

import pytest

from adaptive_attack import RULES, run_attack


@pytest.mark.parametrize("rule", sorted(RULES))
def test_attack_through_every_readable_byte_never_beats_the_intervals(daemon, rule):
    r = run_attack(daemon, rule, seed=7, n=2000, queries=60)
    assert r.answers >= 12, r
    assert r.intervals_checked == r.answers
    assert r.intervals_missing_truth == 0, r.notes
    assert r.false_passes == 0, r.notes
    assert r.salt_fields_seen == 0 and r.export_salts_seen == 0, r
