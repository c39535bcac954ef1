"""One downlink at one moment: geometry, link budget, background light, key rate.

The chain, each step in its own module::

    look (geometry) -> beam footprint and capture (beam) -> pointing (beam)
      -> atmosphere by air mass, optional turbulence (atmosphere)
      -> receiver optics and detector -> background counts from the sky (sun, background)
      -> secret key rate (bb84, finite or cvqkd) beside the PLOB bound (bounds)

The channel transmittance (geometric capture x pointing x atmosphere x turbulence) is what
the PLOB bound applies to; the receiver's optics and detector are trusted and only lower
the rate (Pirandola et al., Nat. Commun. 8, 15043 (2017)). For CV-QKD the receiver's
local oscillator selects a single spatio-temporal mode, so sky light is not counted as
noise (common practice; a daylight CV link pays in excess noise, which is an input).
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime

from keystrata_physics import atmosphere, background, beam, bounds, geometry, sun
from keystrata_physics.bb84 import Bb84Params, decoy_bb84
from keystrata_physics.cvqkd import CvParams, gg02
from keystrata_physics.finite import FiniteParams, finite_decoy_bb84
from keystrata_physics.optics import LinkOptics, Platform, Protocol, StationSky

__all__ = [
    "Budget",
    "LinkPoint",
    "at",
    "budget",
    "evaluate",
    "key_rate",
    "loss_sweep",
    "platform_site",
    "sky_counts",
    "station_site",
]

#: Below this elevation a link is not flown: the air mass formulas and the pointing
#: budgets of free-space terminals are not meant for grazing paths (common practice).
MIN_ELEVATION_DEG = 5.0

#: GG02's key is a difference of entropies of about a bit each, so below about 1e-12 bit
#: per symbol it is rounding: at channel transmittances under about 1e-15 gg02 loses
#: the Holevo term altogether and its "key" passes the PLOB bound. Keys this small (0.1
#: bit/s at 1 GHz) are none in practice, and are counted as none.
CV_KEY_FLOOR = 1e-10


@dataclass(frozen=True, slots=True)
class Budget:
    """The link budget, every term a positive loss in dB.

    Attributes:
        footprint_diameter_m: 1/e^2 beam diameter at the station.
        geometric_db: power outside the receiving aperture.
        pointing_db: mean loss from pointing jitter (Gaussian per axis, see :func:`budget`).
        atmospheric_db: extinction along the slant path.
        turbulence_db: beam wander and spread (0 when the link leaves it out).
        receiver_db: receiver optics and detector (trusted, not part of the PLOB bound).
        channel_db: geometric + pointing + atmospheric + turbulence.
        total_db: channel_db + receiver_db.
    """

    footprint_diameter_m: float
    geometric_db: float
    pointing_db: float
    atmospheric_db: float
    turbulence_db: float
    receiver_db: float

    @property
    def channel_db(self) -> float:
        return self.geometric_db + self.pointing_db + self.atmospheric_db + self.turbulence_db

    @property
    def total_db(self) -> float:
        return self.channel_db + self.receiver_db

    @property
    def channel_transmittance(self) -> float:
        return beam.fraction_from_db(self.channel_db)

    @property
    def total_transmittance(self) -> float:
        return beam.fraction_from_db(self.total_db)


@dataclass(frozen=True, slots=True)
class LinkPoint:
    """The link at one moment, clear sky and platform on station.

    Attributes:
        slant_range_m, elevation_deg: the platform as the station sees it.
        sun_elevation_deg: the sun at the station (``nan`` when no time was given).
        budget: the :class:`Budget`; ``None`` below :data:`MIN_ELEVATION_DEG`.
        background_per_gate: sky photo-detections per gate (BB84; 0 for CV).
        qber: quantum bit error rate (BB84; ``None`` for CV and when no key is made).
        secret_key_rate_bps: secret key rate in bits per second, >= 0.
        plob_bound_bps: the repeaterless bound for the channel at the link's clock
            (``inf`` for a channel without loss; 0 below the minimum elevation).
    """

    slant_range_m: float
    elevation_deg: float
    sun_elevation_deg: float
    budget: Budget | None
    background_per_gate: float
    qber: float | None
    secret_key_rate_bps: float
    plob_bound_bps: float

    @property
    def below_bound_db(self) -> float | None:
        """How far below the PLOB bound the link runs, in dB (``None`` without key)."""
        if self.secret_key_rate_bps <= 0 or self.plob_bound_bps <= 0:
            return None
        return 10.0 * math.log10(self.plob_bound_bps / self.secret_key_rate_bps)


def platform_site(platform: Platform) -> geometry.Site:
    return geometry.Site(platform.latitude_deg, platform.longitude_deg, platform.altitude_m)


def station_site(sky: StationSky) -> geometry.Site:
    return geometry.Site(sky.latitude_deg, sky.longitude_deg, sky.height_m)


def _bound_bps(channel_transmittance: float, clock_hz: float) -> float:
    """The PLOB bound of the channel; ``inf`` for a lossless one (0 dB), which has none."""
    if channel_transmittance >= 1.0:
        return math.inf
    return bounds.plob_bps(channel_transmittance, clock_hz)


def budget(
    optics: LinkOptics,
    look: geometry.Look,
    *,
    platform_altitude_m: float = 20_000.0,
    station_height_m: float = 0.0,
) -> Budget:
    """The link budget of ``optics`` along ``look`` (the heights matter to turbulence).

    The beam leaves the platform with its waist there (``beam.waist_from_divergence_m``)
    and reaches the station with the 1/e^2 radius w(z) of Siegman's Gaussian beam at
    the slant range; the aperture collects 1 - exp(-2 a^2 / w^2). Pointing jitter of
    standard deviation s per axis moves the beam centre by s z at the station, and the
    mean collected power is that of a Gaussian of radius sqrt(w^2 + 4 (s z)^2); the
    pointing term is its ratio to the aligned capture. Extinction is the Kasten-Young
    air mass of the zenith transmittance (``atmosphere.transmittance``).

    Raises:
        ValueError: ``look`` is below :data:`MIN_ELEVATION_DEG`.
    """
    if look.elevation_deg < MIN_ELEVATION_DEG:
        raise ValueError(
            f"elevation_deg must be at least {MIN_ELEVATION_DEG} for a link budget, "
            f"got {look.elevation_deg:.2f}"
        )
    wavelength = optics.wavelength_m
    waist = beam.waist_from_divergence_m(optics.divergence_rad, wavelength)
    radius = beam.beam_radius_m(waist, wavelength, look.slant_range_m)
    captured = beam.capture_fraction(optics.rx_aperture_m, radius)
    # Gaussian jitter of the beam centre, s z per axis at the station, averages the
    # footprint into a Gaussian of radius sqrt(w^2 + 4 (s z)^2) (beam.py), exactly for
    # any aperture and distance; theta^2 / (theta^2 + 4 s^2) is its limit for a small
    # aperture in the far field and overstates the loss of a wide aperture or a beam
    # short of its far field.
    wandering = beam.jittered_beam_radius_m(radius, optics.jitter_rad * look.slant_range_m)
    # min: sqrt(w^2) may come back an ulp wider or narrower than w without jitter
    pointing = min(1.0, beam.capture_fraction(optics.rx_aperture_m, wandering) / captured)
    air = atmosphere.transmittance(optics.zenith_transmittance, look.elevation_deg)
    turbulence = 1.0
    if optics.turbulence:
        turbulence = atmosphere.turbulence_factor(
            waist,
            wavelength,
            90.0 - look.elevation_deg,
            # HV 5/7 counts height above the station's ground
            transmitter_height_m=platform_altitude_m - station_height_m,
            receiver_height_m=0.0,
        )
    receiver = optics.receiver_efficiency * optics.detector_efficiency
    return Budget(  # + 0.0: a factor of exactly 1 is a loss of 0.0 dB, not -0.0
        footprint_diameter_m=2.0 * radius,
        geometric_db=beam.loss_db(captured) + 0.0,
        pointing_db=beam.loss_db(pointing) + 0.0,
        atmospheric_db=beam.loss_db(air) + 0.0,
        turbulence_db=beam.loss_db(turbulence) + 0.0,
        receiver_db=beam.loss_db(receiver) + 0.0,
    )


def sky_counts(optics: LinkOptics, sky: StationSky, sun_elevation_deg: float) -> float:
    """Sky photo-detections per gate with the sun at ``sun_elevation_deg`` (BB84; 0 for
    CV, whose local oscillator filters the sky out)."""
    if optics.protocol is Protocol.CV_GG02 or not math.isfinite(sun_elevation_deg):
        return 0.0
    radiance = background.sky_radiance(
        sun_elevation_deg,
        day_w_m2_sr_nm=sky.day_radiance,
        night_w_m2_sr_nm=sky.night_radiance,
    )
    return background.background_counts_per_gate(
        radiance,
        fov_full_angle_rad=optics.fov_urad * 1e-6,
        aperture_diameter_m=optics.rx_aperture_m,
        filter_width_nm=optics.filter_nm,
        gate_s=optics.gate_ns * 1e-9,
        receiver_efficiency=optics.receiver_efficiency * optics.detector_efficiency,
        wavelength_m=optics.wavelength_m,
    )


def key_rate(
    optics: LinkOptics, channel_transmittance: float, background_per_gate: float
) -> tuple[float, float | None]:
    """Secret key rate in bits per second and QBER (``None`` for CV) of ``optics`` over a
    channel of ``channel_transmittance`` with ``background_per_gate`` sky counts."""
    receiver = optics.receiver_efficiency * optics.detector_efficiency
    if optics.protocol is Protocol.CV_GG02:
        cv = gg02(
            channel_transmittance,
            CvParams(
                modulation_variance=optics.modulation_variance,
                excess_noise=optics.excess_noise,
                detector_efficiency=receiver,
                electronic_noise=optics.electronic_noise,
                reconciliation_efficiency=optics.reconciliation_efficiency,
                detection="heterodyne" if optics.detection == "heterodyne" else "homodyne",
            ),
        )
        key = cv.key_per_symbol if cv.key_per_symbol >= CV_KEY_FLOOR else 0.0
        return key * optics.clock_hz, None
    dark = optics.detectors * optics.dark_count_rate_hz * optics.gate_ns * 1e-9
    dark_yield = min(1.0, dark + background_per_gate)
    eta_total = channel_transmittance * receiver
    if optics.block_pulses is None:
        params = Bb84Params(
            mu=optics.mu,
            nu=optics.nu,
            misalignment=optics.misalignment,
            ec_efficiency=optics.ec_efficiency,
        )
        asymptotic = decoy_bb84(eta_total, dark_yield, params)
        per_pulse, qber = asymptotic.key_per_pulse, asymptotic.qber
    else:
        finite = finite_decoy_bb84(
            eta_total,
            dark_yield,
            FiniteParams(
                mu=optics.mu,
                nu=optics.nu,
                misalignment=optics.misalignment,
                ec_efficiency=optics.ec_efficiency,
            ),
            pulses=optics.block_pulses,
        )
        per_pulse, qber = finite.key_per_pulse, finite.qber
    return max(0.0, per_pulse) * optics.clock_hz, qber


def evaluate(
    optics: LinkOptics,
    look: geometry.Look,
    *,
    sky: StationSky,
    sun_elevation_deg: float,
    platform_altitude_m: float = 20_000.0,
) -> LinkPoint:
    """The link along ``look`` with the sun at ``sun_elevation_deg`` over the station."""
    if look.elevation_deg < MIN_ELEVATION_DEG:
        return LinkPoint(
            look.slant_range_m, look.elevation_deg, sun_elevation_deg, None, 0.0, None, 0.0, 0.0
        )
    terms = budget(
        optics, look, platform_altitude_m=platform_altitude_m, station_height_m=sky.height_m
    )
    eta_channel = terms.channel_transmittance
    plob = _bound_bps(eta_channel, optics.clock_hz)
    sky_light = sky_counts(optics, sky, sun_elevation_deg)
    rate, qber = key_rate(optics, eta_channel, sky_light)
    return LinkPoint(
        look.slant_range_m,
        look.elevation_deg,
        sun_elevation_deg,
        terms,
        sky_light,
        qber if rate > 0 else None,
        rate,
        plob,
    )


def loss_sweep(
    optics: LinkOptics, losses_db: list[float], *, background_per_gate: float = 0.0
) -> list[tuple[float, float, float]]:
    """``(channel loss dB, key rate bps, PLOB bound bps)`` over ``losses_db``: the link's
    protocol and receiver against channel loss alone (for the rate-against-loss plot).

    Raises:
        ValueError: a loss is negative or not finite (``loss_db``).
    """
    out = []
    for loss in losses_db:
        eta = beam.fraction_from_db(loss)
        rate, _ = key_rate(optics, eta, background_per_gate)
        out.append((loss, rate, _bound_bps(eta, optics.clock_hz)))
    return out


def at(optics: LinkOptics, platform: Platform, sky: StationSky, when: datetime) -> LinkPoint:
    """The link at ``when`` (timezone-aware), platform at the centre of its circle."""
    look = geometry.look(station_site(sky), platform_site(platform))
    solar = sun.sun_position(when, sky.latitude_deg, sky.longitude_deg)
    return evaluate(
        optics,
        look,
        sky=sky,
        sun_elevation_deg=solar.elevation_deg,
        platform_altitude_m=platform.altitude_m,
    )
