"""The physical link model and key-supply planning: pure arithmetic, no I/O.

How much key a QKD link from a stratospheric platform makes, from its geometry, optics,
atmosphere, background light and protocol, and how much of it each station pair gets.
Used by the operator's planning command and API route, by the node's planned-vs-observed
figures and by the link emulator. This package imports neither ``keystrata`` nor
``keystrata_client``, so both the service and the SDK may use it.

Conventions, everywhere in the package: SI units (metres, seconds, watts, radians) unless
a name says otherwise (``_deg``, ``_db``, ``_nm``); a beam radius is the 1/e^2 intensity
radius; a divergence is the far-field half-angle; a loss in dB is positive.

These are engineering estimates, not a security proof: the security of delivered key
comes from the QKD modules' own post-processing.
"""
