"""Fidelity re-anchoring keeps the estimate's coherent part.

Reference values: the unitary channels are built directly from their matrices; the diamond
distance of a single-qubit rotation by ``theta`` from the identity is ``sin(theta / 2)``
(common practice: for unitaries, half the diamond norm of the difference is
``sqrt(1 - min |<psi|U|psi>|**2)``, the numerical range of ``U`` being the chord between
``exp(-+ i theta / 2)``).
"""

from __future__ import annotations

import numpy as np
import pytest

from robusttomo import assess, metrics
from robusttomo.channels import Channel, depolarizing, embed, rotation


def _trace_functional(n):
    return assess._functional(n, None, Channel.from_ptm(np.eye(4**n)))


def _decay(ch, n):
    return float(_trace_functional(n) @ ch.unital_block.reshape(-1))


@pytest.mark.parametrize("n, u", [(1, rotation("X", 0.3)), (2, rotation("ZZ", 0.2) @ embed(rotation("Y", 0.1), [0], 2))])
def test_closest_unitary_of_a_noisy_rotation_is_the_rotation(n, u):
    noisy = Channel.from_ptm(0.9 * u.ptm + 0.1 * depolarizing(n, 0.0).ptm)
    np.testing.assert_allclose(assess._closest_unitary(noisy).ptm, u.ptm, atol=1e-12)


def test_anchor_removes_incoherent_excess_and_keeps_the_rotation():
    theta = 0.3
    u = rotation("X", theta)
    assert metrics.diamond_distance(u) == pytest.approx(np.sin(theta / 2), abs=1e-6)
    est = Channel.from_ptm(0.8 * u.ptm + 0.2 * depolarizing(1, 0.0).ptm)  # excess incoherent error
    f = _trace_functional(1)
    # all the way up to the rotation's own decay: the rotation itself comes back
    back, w = assess._anchor(est, f, _decay(u, 1))
    np.testing.assert_allclose(back.ptm, u.ptm, atol=1e-12)
    assert w == pytest.approx(1.0)
    # part way: the decay is met and the coherent part is the rotation's
    target = 0.5 * (_decay(est, 1) + _decay(u, 1))
    mid, w = assess._anchor(est, f, target)
    assert _decay(mid, 1) == pytest.approx(target, abs=1e-13) and 0 < w < 1
    np.testing.assert_allclose(assess._closest_unitary(mid).ptm, u.ptm, atol=1e-10)
    # mixing with the identity to the same decay shrinks the diamond distance more
    a_id = (target - _decay(est, 1)) / (1 - _decay(est, 1))
    by_identity = Channel.from_ptm((1 - a_id) * est.ptm + a_id * np.eye(4))
    assert metrics.diamond_distance(mid) > metrics.diamond_distance(by_identity) + 1e-3


def test_anchor_above_the_unitary_goes_on_towards_the_identity_and_below_towards_depolarizing():
    u = rotation("Z", 0.4)
    est = Channel.from_ptm(0.9 * u.ptm + 0.1 * depolarizing(1, 0.0).ptm)
    f = _trace_functional(1)
    high = 0.5 * (_decay(u, 1) + 1.0)
    up, w = assess._anchor(est, f, high)
    assert _decay(up, 1) == pytest.approx(high, abs=1e-13) and w == 1.0 and up.is_cptp(atol=1e-10)
    low = 0.5 * _decay(est, 1)
    down, w = assess._anchor(est, f, low)
    assert _decay(down, 1) == pytest.approx(low, abs=1e-13) and w < 0 and down.is_cptp(atol=1e-10)
    same, w = assess._anchor(est, f, _decay(est, 1))
    assert same is est and w == 0.0
