"""No computed key rate exceeds the repeaterless bound of its channel.

Pirandola, Laurenza, Ottaviani and Banchi, Nat. Commun. 8, 15043 (2017): a point-to-point
link of channel transmittance ``T`` gives at most ``-log2(1 - T)`` secret bits per
channel use, whatever the protocol. The discrete-variable rates are per pulse and take
the total transmittance ``T eta_rx`` (channel x trusted receiver); the bound holds for
``T``, and the test uses the stricter ``-log2(1 - T eta_rx)``. The CV rate takes ``T``
alone (its detector is in ``CvParams``). Transmittances from 1e-8 to 0.99, log-uniform.
"""

from __future__ import annotations

import math

from hypothesis import given
from hypothesis import strategies as st

from keystrata_physics.bb84 import Bb84Params, decoy_bb84
from keystrata_physics.bounds import plob_bits_per_use
from keystrata_physics.cvqkd import CvParams, gg02
from keystrata_physics.finite import FiniteParams, finite_decoy_bb84, finite_decoy_bb84_limit

channel = st.floats(min_value=-8.0, max_value=math.log10(0.99)).map(lambda x: 10.0**x)
receiver = st.floats(min_value=0.01, max_value=1.0)
dark_yield = st.one_of(
    st.just(0.0), st.floats(min_value=-9.0, max_value=-2.0).map(lambda x: 10.0**x)
)
misalignment = st.floats(min_value=0.0, max_value=0.1)


@st.composite
def bb84_params(draw: st.DrawFn) -> Bb84Params:
    mu = draw(st.floats(min_value=0.01, max_value=2.0))
    return Bb84Params(
        mu=mu,
        nu=mu * draw(st.floats(min_value=0.01, max_value=0.95)),
        misalignment=draw(misalignment),
        ec_efficiency=draw(st.floats(min_value=1.0, max_value=1.5)),
        sifting=draw(st.floats(min_value=0.1, max_value=1.0)),
    )


@st.composite
def finite_params(draw: st.DrawFn) -> FiniteParams:
    mu = draw(st.floats(min_value=0.05, max_value=1.5))
    nu = mu * draw(st.floats(min_value=0.02, max_value=0.6))
    omega = nu * draw(st.floats(min_value=0.0, max_value=0.5))
    p_mu = draw(st.floats(min_value=0.05, max_value=0.9))
    p_nu = (1.0 - p_mu) * draw(st.floats(min_value=0.05, max_value=0.95))
    return FiniteParams(
        mu=mu,
        nu=nu,
        omega=omega,
        p_mu=p_mu,
        p_nu=p_nu,
        p_omega=1.0 - p_mu - p_nu,
        basis_probability=draw(st.floats(min_value=0.05, max_value=0.95)),
        misalignment=draw(misalignment),
        ec_efficiency=draw(st.floats(min_value=1.0, max_value=1.5)),
        eps_sec=draw(st.sampled_from([1e-3, 1e-6, 1e-10, 1e-15])),
    )


@given(channel, receiver, dark_yield, bb84_params())
def test_asymptotic_decoy_bb84(t: float, eta_rx: float, y0: float, p: Bb84Params) -> None:
    bound = plob_bits_per_use(t * eta_rx)
    assert decoy_bb84(t * eta_rx, y0, p, decoy="vacuum+weak").key_per_pulse <= bound
    assert decoy_bb84(t * eta_rx, y0, p, decoy="infinite").key_per_pulse <= bound


@given(
    channel,
    receiver,
    dark_yield,
    finite_params(),
    st.floats(min_value=4.0, max_value=18.0).map(lambda x: 10.0**x),
)
def test_finite_decoy_bb84(
    t: float, eta_rx: float, y0: float, p: FiniteParams, pulses: float
) -> None:
    bound = plob_bits_per_use(t * eta_rx)
    assert finite_decoy_bb84(t * eta_rx, y0, p, pulses=pulses).key_per_pulse <= bound
    assert finite_decoy_bb84_limit(t * eta_rx, y0, p) <= bound


@given(
    channel,
    st.sampled_from(["homodyne", "heterodyne"]),
    st.floats(min_value=0.01, max_value=1e4),
    st.floats(min_value=0.0, max_value=0.5),
    st.floats(min_value=0.05, max_value=1.0),
    st.floats(min_value=0.0, max_value=0.5),
    st.floats(min_value=0.5, max_value=1.0),
)
def test_gg02(
    t: float, detection: str, v_a: float, xi: float, eta: float, v_el: float, beta: float
) -> None:
    p = CvParams(
        modulation_variance=v_a,
        excess_noise=xi,
        detector_efficiency=eta,
        electronic_noise=v_el,
        reconciliation_efficiency=beta,
        detection="homodyne" if detection == "homodyne" else "heterodyne",
    )
    assert gg02(t, p).key_per_symbol <= plob_bits_per_use(t)


def test_the_bound_is_not_loose_for_an_ideal_cv_link() -> None:
    # A check that the property tests can fail: pure loss, ideal detector, beta = 1 and a
    # large modulation give half the bound with homodyne and more with heterodyne at low
    # loss, so a rate scaled up by 2.5 would break them.
    t = 0.5
    ideal = {"excess_noise": 0.0, "detector_efficiency": 1.0, "electronic_noise": 0.0}
    hom = gg02(t, CvParams(modulation_variance=1e6, reconciliation_efficiency=1.0, **ideal))
    het = gg02(
        t,
        CvParams(
            modulation_variance=1e6, reconciliation_efficiency=1.0, detection="heterodyne", **ideal
        ),
    )
    bound = plob_bits_per_use(t)
    assert 0.45 * bound < hom.key_per_symbol < 0.55 * bound
    assert 0.4 * bound < het.key_per_symbol < bound
