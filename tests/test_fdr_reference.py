"""Benjamini-Hochberg q values against a hand-computed example, not against scipy.

Source: Benjamini, Y. and Hochberg, Y. (1995), "Controlling the false discovery rate: a practical
and powerful approach to multiple testing", J. R. Statist. Soc. B 57(1), 289-300, section 4: the
15 ordered p values of a multiple-endpoint clinical trial (values recalled from memory). At
q* = 0.05 the step-up procedure rejects the four smallest, Bonferroni only three.

drift's q values come from ``drift.compare.calibration.bh_qvalues`` where it exists, else from
``scipy.stats.false_discovery_control`` (method "bh"), which ``drift.compare.calibration`` calls;
either way the expected figures below are computed by hand, not by the code under test.
"""

from __future__ import annotations

from functools import partial

import numpy as np
import pytest
from scipy import stats

from drift.compare import calibration

PAPER_P = np.array([
    0.0001, 0.0004, 0.0019, 0.0095, 0.0201, 0.0278, 0.0298, 0.0344,
    0.0459, 0.3240, 0.4262, 0.5719, 0.6528, 0.7590, 1.0000,
])

# By hand: q(i) = min over j >= i of p(j) * 15 / j.
#   p(j) * 15 / j for j = 1..15:
#   0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.0695, 0.063857, 0.0645,
#   0.0765, 0.486, 0.581182, 0.714875, 0.753231, 0.813214, 1.0
#   the running minimum from the top changes only q(6): min(0.0695, 0.063857, ...) = 0.063857
HAND_Q = np.array([
    0.0015, 0.003, 0.0095, 0.035625, 0.0603, 0.0298 * 15 / 7, 0.0298 * 15 / 7, 0.0645,
    0.0765, 0.486, 0.4262 * 15 / 11, 0.5719 * 15 / 12, 0.6528 * 15 / 13, 0.7590 * 15 / 14, 1.0,
])


def _implementation():
    """drift's BH function: its own where it has one, else the scipy call drift makes."""
    own = getattr(calibration, "bh_qvalues", None)
    return own if own is not None else partial(stats.false_discovery_control, method="bh")


def test_bh_q_values_match_the_hand_computed_example():
    q = np.asarray(_implementation()(PAPER_P), dtype=float)
    np.testing.assert_allclose(q, HAND_Q, rtol=1e-9, atol=1e-12)


def test_bh_rejects_four_at_005_as_in_the_paper():
    q = np.asarray(_implementation()(PAPER_P), dtype=float)
    assert int((q <= 0.05).sum()) == 4  # the paper: BH rejects 4 hypotheses
    assert int((PAPER_P <= 0.05 / len(PAPER_P)).sum()) == 3  # the paper: Bonferroni rejects 3


def test_bh_q_values_do_not_depend_on_the_input_order():
    rng = np.random.default_rng(1995)
    order = rng.permutation(len(PAPER_P))
    q = np.asarray(_implementation()(PAPER_P[order]), dtype=float)
    np.testing.assert_allclose(q, HAND_Q[order], rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("alpha", [0.01, 0.05, 0.1])
def test_bh_step_up_rule_by_hand(alpha):
    """The step-up rule itself: reject p(1..k) for the largest k with p(k) <= k / m * alpha."""
    m = len(PAPER_P)
    below = [k for k in range(1, m + 1) if PAPER_P[k - 1] <= k / m * alpha]
    largest = max(below, default=0)
    q = np.asarray(_implementation()(PAPER_P), dtype=float)
    assert int((q <= alpha).sum()) == largest
