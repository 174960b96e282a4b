"""SCPI instrument drivers over pyvisa (installed as ``noisebench.drivers``).

Open instruments by VISA resource string; every SCPI string comes from a profile
(``noisebench/drivers/profiles/generic.toml`` is the simulated bench's command set; copy and edit
it for
your instruments)::

    from noisebench.drivers import open_analyzer, open_supply_noise_source
    with open_analyzer("TCPIP0::192.168.1.20::5025::SOCKET", "my_analyzer.toml") as analyzer:
        ...

Layers: :mod:`~noisebench.drivers.transport` (the VISA session), :mod:`~noisebench.drivers.
profile` (profiles), :mod:`~noisebench.drivers.scpi_channel` (error queue, retries,
recovery), then the instruments: :class:`ScpiAnalyzer`, :class:`ScpiGenerator`,
:class:`ScpiSupply` and the noise-source controls. :mod:`~noisebench.drivers.protocol` has
``replay_dialogue`` for testing a profile without hardware.
"""

from __future__ import annotations

from pathlib import Path

from .analyzer import ScpiAnalyzer
from .generator import ScpiGenerator
from .noise_source import (
    AnalyzerDriveNoiseSource,
    CallableNoiseSource,
    OperatorNoiseSource,
    ScpiSupply,
    SupplyNoiseSource,
    check_source_switching,
)
from .profile import (
    InstrumentProfile,
    ProfileError,
    available_profiles,
    load_profile,
)
from .protocol import replay_dialogue
from .transport import Transport, VisaSession

__all__ = [
    "AnalyzerDriveNoiseSource",
    "CallableNoiseSource",
    "InstrumentProfile",
    "OperatorNoiseSource",
    "ProfileError",
    "ScpiAnalyzer",
    "ScpiGenerator",
    "ScpiSupply",
    "SupplyNoiseSource",
    "Transport",
    "VisaSession",
    "available_profiles",
    "check_source_switching",
    "replay_dialogue",
    "load_profile",
    "open_analyzer",
    "open_generator",
    "open_session",
    "open_supply",
    "open_supply_noise_source",
]


def open_session(
    resource: str,
    profile: InstrumentProfile,
    *,
    timeout_s: float | None = None,
    visa_library: str = "@py",
) -> VisaSession:
    """A :class:`VisaSession` with the profile's terminations, reader and (default) timeout."""
    conn = profile.connection
    return VisaSession(
        resource,
        visa_library=visa_library,
        timeout_s=conn.timeout_s if timeout_s is None else timeout_s,
        read_termination=conn.read_termination,
        write_termination=conn.write_termination,
        binary_reader=conn.binary_reader,
        baud_rate=conn.baud_rate,
    )


def _open(
    cls,
    resource: str,
    profile: str | Path | InstrumentProfile,
    kind: str,
    timeout_s: float | None,
    visa_library: str,
    **kwargs,
):
    loaded = load_profile(profile)
    loaded.section(kind)  # a clear error before any connection is made
    session = open_session(resource, loaded, timeout_s=timeout_s, visa_library=visa_library)
    try:
        return cls(session, loaded, **kwargs)
    except BaseException:
        session.close()
        raise


def open_analyzer(
    resource: str,
    profile: str | Path | InstrumentProfile = "generic",
    *,
    timeout_s: float = 5.0,
    visa_library: str = "@py",
    retries: int = 2,
) -> ScpiAnalyzer:
    """Open a spectrum analyzer by VISA resource string (``timeout_s`` in seconds)."""
    return _open(
        ScpiAnalyzer, resource, profile, "analyzer", timeout_s, visa_library, retries=retries
    )


def open_generator(
    resource: str,
    profile: str | Path | InstrumentProfile = "generic",
    *,
    timeout_s: float = 5.0,
    visa_library: str = "@py",
    retries: int = 2,
    max_level_dbm: float | None = None,
) -> ScpiGenerator:
    """Open a CW signal generator; ``max_level_dbm`` refuses higher levels (SafetyError)."""
    return _open(
        ScpiGenerator,
        resource,
        profile,
        "generator",
        timeout_s,
        visa_library,
        retries=retries,
        max_level_dbm=max_level_dbm,
    )


def open_supply(
    resource: str,
    profile: str | Path | InstrumentProfile = "generic",
    *,
    timeout_s: float = 5.0,
    visa_library: str = "@py",
    retries: int = 2,
) -> ScpiSupply:
    """Open a SCPI DC supply."""
    return _open(ScpiSupply, resource, profile, "supply", timeout_s, visa_library, retries=retries)


def open_supply_noise_source(
    resource: str,
    *,
    drive_v: float | None = None,
    current_limit_a: float,
    max_drive_v: float,
    settle_time_s: float,
    profile: str | Path | InstrumentProfile = "generic",
    enr_table=None,
    min_current_a: float | None = None,
    timeout_s: float = 5.0,
    visa_library: str = "@py",
    retries: int = 2,
) -> SupplyNoiseSource:
    """A noise source driven by the SCPI DC supply at ``resource``.

    ``drive_v`` (V) defaults to ``enr_table.metadata.nominal_drive_v``; above ``max_drive_v``
    it is refused (SafetyError) before the supply is touched."""
    from .noise_source import _drive_voltage

    _drive_voltage(drive_v, enr_table, max_drive_v)  # refuse before connecting
    supply = open_supply(
        resource, profile, timeout_s=timeout_s, visa_library=visa_library, retries=retries
    )
    try:
        return SupplyNoiseSource(
            supply,
            drive_v=drive_v,
            current_limit_a=current_limit_a,
            max_drive_v=max_drive_v,
            settle_time_s=settle_time_s,
            enr_table=enr_table,
            min_current_a=min_current_a,
        )
    except BaseException:
        supply.close()
        raise
