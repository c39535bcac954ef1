"""What the model needs to know about a link, its two ends and their sky.

Four plain records, each checked when built (a ``ValueError`` names the field):

- :class:`LinkOptics`: the transmitter on the platform, the receiver at the station and
  the protocol they run. The platform carries the transmitter (a downlink).
- :class:`Platform`: where the relay flies and when it is on station.
- :class:`StationSky`: where a station stands, its sky brightness by day and by night and
  its chance of a clear line of sight by month and hour.
- :func:`from_mapping`: builds any of them from a JSON-like mapping, refusing unknown
  names, so the registry, the network description and the emulator share one format.

Units are in the names: ``_urad`` microradians, ``_nm`` nanometres, ``_ns`` nanoseconds,
``_hz`` per second, ``_m`` metres. A divergence is the far-field half-angle of the 1/e^2
intensity radius; a field of view is the full angle.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from enum import StrEnum
from typing import Any, TypeVar

from keystrata_physics.bb84 import MAX_MEAN_PHOTON_NUMBER

__all__ = [
    "ClearSky",
    "LinkOptics",
    "Platform",
    "Protocol",
    "StationSky",
    "from_mapping",
]


class Protocol(StrEnum):
    """The QKD protocol a link runs."""

    DECOY_BB84 = "decoy-bb84"  # weak coherent pulses, vacuum + weak decoy
    CV_GG02 = "cv-gg02"  # Gaussian-modulated coherent states, reverse reconciliation


def _require(ok: bool, name: str, rule: str, value: object) -> None:
    if not ok:
        raise ValueError(f"{name} must be {rule}, got {value!r}")


def _finite(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and math.isfinite(value)


def _in(name: str, value: float, low: float, high: float, *, open_low: bool = False) -> None:
    ok = _finite(value) and (low < value if open_low else low <= value) and value <= high
    rule = f"in ({low}, {high}]" if open_low else f"in [{low}, {high}]"
    _require(ok, name, rule, value)


def _positive(name: str, value: float) -> None:
    _require(_finite(value) and value > 0, name, "a number > 0", value)


def _not_negative(name: str, value: float) -> None:
    _require(_finite(value) and value >= 0, name, "a number >= 0", value)


@dataclass(frozen=True, slots=True)
class LinkOptics:
    """One downlink's transmitter, receiver and protocol.

    Defaults describe a plausible decoy-BB84 downlink near 850 nm (engineering defaults
    of our own, not a product's data sheet); every field may be set.

    Attributes:
        protocol: :class:`Protocol` value.
        clock_hz: pulses (BB84) or symbols (CV) sent per second.
        wavelength_nm: carrier wavelength.
        divergence_urad: far-field half-angle divergence of the transmitted beam.
        rx_aperture_m: diameter of the receiving telescope.
        pointing_jitter_urad: standard deviation of the pointing error per axis.
        zenith_transmittance: clear-sky transmittance of the whole atmosphere at zenith.
        turbulence: include the turbulence term of the link budget.
        receiver_efficiency: transmittance of the receiver optics (telescope to detector).
        detector_efficiency: detection efficiency (BB84) or homodyne efficiency (CV).
        dark_count_rate_hz: dark counts per second of each detector (BB84).
        detectors: detectors of the receiver (BB84; 4 for passive basis choice).
        gate_ns: detection gate width (BB84).
        filter_nm: spectral filter width at the receiver.
        fov_urad: full-angle field of view of the receiver.
        mu, nu: signal and weak-decoy mean photon numbers (BB84).
        misalignment: optical error probability e_d (BB84).
        ec_efficiency: error-correction inefficiency f >= 1 (BB84).
        block_pulses: pulses per finite-key block; ``None`` = asymptotic (BB84).
        modulation_variance: V_A in shot-noise units (CV).
        excess_noise: excess noise at the channel input, shot-noise units (CV).
        electronic_noise: detector electronic noise, shot-noise units (CV).
        reconciliation_efficiency: beta (CV).
        detection: ``"homodyne"`` or ``"heterodyne"`` (CV).
    """

    protocol: Protocol = Protocol.DECOY_BB84
    clock_hz: float = 1.0e9
    wavelength_nm: float = 850.0
    divergence_urad: float = 10.0
    rx_aperture_m: float = 0.4
    pointing_jitter_urad: float = 1.0
    zenith_transmittance: float = 0.8
    turbulence: bool = False
    receiver_efficiency: float = 0.5
    detector_efficiency: float = 0.6
    dark_count_rate_hz: float = 100.0
    detectors: int = 4
    gate_ns: float = 1.0
    filter_nm: float = 1.0
    fov_urad: float = 100.0
    mu: float = 0.5
    nu: float = 0.1
    misalignment: float = 0.01
    ec_efficiency: float = 1.16
    block_pulses: float | None = None
    modulation_variance: float = 4.0
    excess_noise: float = 0.01
    electronic_noise: float = 0.01
    reconciliation_efficiency: float = 0.95
    detection: str = "homodyne"

    def __post_init__(self) -> None:
        try:
            object.__setattr__(self, "protocol", Protocol(self.protocol))
        except ValueError:
            known = ", ".join(p.value for p in Protocol)
            raise ValueError(f"protocol must be one of {known}, got {self.protocol!r}") from None
        _in("clock_hz", self.clock_hz, 0.0, 1e12, open_low=True)
        _in("wavelength_nm", self.wavelength_nm, 300.0, 2000.0)
        # The lower ends keep every factor of the budget a normal float: a beam wider
        # than about 27 m at its waist, an aperture under 1 mm or an efficiency below
        # 1e-9 would round the collected power to zero.
        _in("divergence_urad", self.divergence_urad, 0.01, 1e5)
        _in("rx_aperture_m", self.rx_aperture_m, 0.001, 20.0)
        _in("pointing_jitter_urad", self.pointing_jitter_urad, 0.0, 1e5)
        for name in ("zenith_transmittance", "receiver_efficiency", "detector_efficiency"):
            _in(name, getattr(self, name), 1e-9, 1.0)
        _require(isinstance(self.turbulence, bool), "turbulence", "true or false", self.turbulence)
        _not_negative("dark_count_rate_hz", self.dark_count_rate_hz)
        ok = isinstance(self.detectors, int) and not isinstance(self.detectors, bool)
        _require(ok and 1 <= self.detectors <= 16, "detectors", "an integer 1-16", self.detectors)
        for name in ("gate_ns", "filter_nm"):
            _positive(name, getattr(self, name))
        # The sky's etendue is taken as solid angle x area (background.py), which holds
        # for a field of view of a few degrees or less: 1e5 microradians is 5.7 degrees.
        _in("fov_urad", self.fov_urad, 0.0, 1e5, open_low=True)
        # The decoy bounds (bb84.py, finite.py) take mean photon numbers up to
        # MAX_MEAN_PHOTON_NUMBER; below 1e-6 a source sends next to nothing, and far
        # below it the quotient mu / (mu nu - nu^2) of Ma et al.'s bound divides by zero.
        _in("mu", self.mu, 1e-6, MAX_MEAN_PHOTON_NUMBER)
        _in("nu", self.nu, 1e-6, MAX_MEAN_PHOTON_NUMBER)
        _require(self.nu < self.mu, "nu", f"below mu ({self.mu})", self.nu)
        _in("misalignment", self.misalignment, 0.0, 0.5)
        _in("ec_efficiency", self.ec_efficiency, 1.0, 3.0)
        if self.block_pulses is not None:
            _in("block_pulses", self.block_pulses, 1e3, 1e18)
        # Far beyond any Gaussian-modulated system (V_A of a few to a few tens, noise of
        # hundredths of a shot noise), and short of where GG02's terms overflow.
        _in("modulation_variance", self.modulation_variance, 0.0, 1e3, open_low=True)
        _in("excess_noise", self.excess_noise, 0.0, 10.0)
        _in("electronic_noise", self.electronic_noise, 0.0, 10.0)
        _in("reconciliation_efficiency", self.reconciliation_efficiency, 0.0, 1.0, open_low=True)
        ok = self.detection in ("homodyne", "heterodyne")
        _require(ok, "detection", "homodyne or heterodyne", self.detection)

    @property
    def wavelength_m(self) -> float:
        return self.wavelength_nm * 1e-9

    @property
    def divergence_rad(self) -> float:
        return self.divergence_urad * 1e-6

    @property
    def jitter_rad(self) -> float:
        return self.pointing_jitter_urad * 1e-6


@dataclass(frozen=True, slots=True)
class Platform:
    """Where the relay flies and when.

    Attributes:
        latitude_deg, longitude_deg: centre of its station-keeping circle.
        altitude_m: flight altitude (stratospheric platforms fly at about 17-22 km,
            common practice).
        station_keeping_radius_m: ground radius of the circle it stays within.
        on_station_hours: UTC hours [start, end) it is on station and holds its links,
            each pair of numbers in [0, 24]; a window may wrap midnight (22, 4). Empty
            means always on station.
    """

    latitude_deg: float
    longitude_deg: float
    altitude_m: float = 20_000.0
    station_keeping_radius_m: float = 0.0
    on_station_hours: tuple[tuple[float, float], ...] = ()

    def __post_init__(self) -> None:
        _in("latitude_deg", self.latitude_deg, -90.0, 90.0)
        _in("longitude_deg", self.longitude_deg, -180.0, 180.0)
        _in("altitude_m", self.altitude_m, 1_000.0, 100_000_000.0)
        _in("station_keeping_radius_m", self.station_keeping_radius_m, 0.0, 200_000.0)
        object.__setattr__(self, "on_station_hours", _windows(self.on_station_hours))

    def on_station(self, utc_hour: float) -> bool:
        """Whether the platform is on station at ``utc_hour`` (in [0, 24))."""
        if not self.on_station_hours:
            return True
        for start, end in self.on_station_hours:
            inside = start <= utc_hour < end if start <= end else not end <= utc_hour < start
            if inside:
                return True
        return False


def _windows(value: object) -> tuple[tuple[float, float], ...]:
    """The on-station windows as pairs of floats, or a ValueError naming the field."""
    rule = "a list of [start, end] pairs of UTC hours in [0, 24]"
    if not isinstance(value, Sequence) or isinstance(value, str | bytes):
        raise ValueError(f"on_station_hours must be {rule}, got {value!r}")
    out = []
    for window in value:
        ok = isinstance(window, Sequence) and not isinstance(window, str | bytes)
        ok = ok and len(window) == 2 and all(_finite(h) and 0 <= h <= 24 for h in window)
        _require(ok, "on_station_hours", rule, window)
        out.append((float(window[0]), float(window[1])))
    return tuple(out)


ClearSky = tuple[tuple[float, ...], ...]
"""Probability of a clear line of sight, 12 months x 24 UTC hours."""


def _clear_table(value: object) -> ClearSky:
    """Accept a number, 12 numbers (one per month) or 12 x 24 numbers."""
    rule = "a probability, 12 of them (by month) or 12 rows of 24 (by month and UTC hour)"
    if _finite(value):
        rows: list[list[object]] = [[value] * 24 for _ in range(12)]
    elif isinstance(value, Sequence) and not isinstance(value, str) and len(value) == 12:
        rows = [
            list(r) if isinstance(r, Sequence) and not isinstance(r, str) else [r] * 24
            for r in value
        ]
    else:
        raise ValueError(f"clear_sky must be {rule}")
    for month, row in enumerate(rows, start=1):
        if len(row) != 24 or not all(_finite(p) and 0 <= p <= 1 for p in row):  # type: ignore[operator]
            raise ValueError(f"clear_sky must be {rule}; month {month} is not")
    return tuple(tuple(float(p) for p in row) for row in rows)  # type: ignore[arg-type]


@dataclass(frozen=True, slots=True)
class StationSky:
    """Where a station stands and what its sky is like.

    Attributes:
        latitude_deg, longitude_deg, height_m: the station's position.
        day_radiance: clear daytime sky spectral radiance toward the platform,
            W m^-2 sr^-1 nm^-1 (of order 1e-2 to 1e-1 near 800 nm, from memory).
        night_radiance: moonless night sky, same unit (many orders lower, from memory).
        clear_sky: chance of a clear line of sight by month and UTC hour (see
            :data:`ClearSky`); a single number or 12 monthly numbers are accepted.
        mean_cloud_spell_s: mean length of a cloud spell, for buffer sizing.
    """

    latitude_deg: float
    longitude_deg: float
    height_m: float = 0.0
    day_radiance: float = 0.03
    night_radiance: float = 1e-7
    clear_sky: Any = 1.0
    mean_cloud_spell_s: float = 3600.0

    def __post_init__(self) -> None:
        _in("latitude_deg", self.latitude_deg, -90.0, 90.0)
        _in("longitude_deg", self.longitude_deg, -180.0, 180.0)
        # geometry.Site takes heights above -500 m, not at it
        _in("height_m", self.height_m, -500.0, 9_000.0, open_low=True)
        # background.sky_radiance interpolates log(radiance) through twilight, from the
        # night value up to the day value: both > 0, night not above day.
        _positive("day_radiance", self.day_radiance)
        _positive("night_radiance", self.night_radiance)
        rule = f"at most day_radiance ({self.day_radiance!r})"
        _require(
            self.night_radiance <= self.day_radiance, "night_radiance", rule, self.night_radiance
        )
        _not_negative("mean_cloud_spell_s", self.mean_cloud_spell_s)
        object.__setattr__(self, "clear_sky", _clear_table(self.clear_sky))

    def clear_probability(self, month: int, utc_hour: int) -> float:
        """The chance of a clear line of sight in ``month`` (1-12) at ``utc_hour``."""
        table: ClearSky = self.clear_sky
        return table[month - 1][utc_hour % 24]


_T = TypeVar("_T", bound=LinkOptics | Platform | StationSky)


def from_mapping(kind: type[_T], values: Mapping[str, Any]) -> _T:
    """Build ``kind`` from a JSON-like mapping; unknown names are refused.

    Raises:
        ValueError: an unknown or missing name, or a value out of range (named).
    """
    fields = dataclasses.fields(kind)
    names = {f.name for f in fields}
    unknown = sorted(str(name) for name in set(values) - names)
    if unknown:
        raise ValueError(f"unknown field {unknown[0]!r}; known: {', '.join(sorted(names))}")
    required = [
        f.name
        for f in fields
        if f.default is dataclasses.MISSING and f.default_factory is dataclasses.MISSING
    ]
    missing = [name for name in required if name not in values]
    if missing:
        raise ValueError(f"missing required field {missing[0]!r}")
    return kind(**values)
