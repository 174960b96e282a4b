"""``noisebench info``: what is installed and what the VISA layer can see.

The first thing to look at when an instrument will not talk: versions, the VISA back ends
pyvisa knows, the resources the pyvisa-py back end finds (listing is bounded by a timeout and
never raises), the packaged instrument profiles and simulator scenarios. With ``--ranges``, the
plausibility ranges plans, tables and readings are checked against
(:mod:`noisebench.science.ranges`), each with its source.
"""

from __future__ import annotations

import logging
import platform
import textwrap
import threading
import warnings
from importlib import metadata, resources
from typing import Any

logger = logging.getLogger(__name__)

DISTRIBUTIONS = (
    "noisebench",
    "numpy",
    "scipy",
    "pydantic",
    "pyvisa",
    "pyvisa-py",
    "matplotlib",
    "scikit-rf",
    "rich",
    "sqlalchemy",
    "psycopg",
    "pyserial",
    "pyusb",
)


def versions() -> dict[str, str]:
    """Python and package versions ('-' when a package is not installed)."""
    out = {"python": platform.python_version()}
    for dist in DISTRIBUTIONS:
        try:
            out[dist] = metadata.version(dist)
        except metadata.PackageNotFoundError:
            out[dist] = "-"
    return out


def _log_notes(what: str, caught: list[warnings.WarningMessage]) -> None:
    """pyvisa-py's warnings (discovery limits, missing optional packages, an unclosed
    broadcast socket) are diagnosis, not output: logged at DEBUG, shown with ``-v`` only."""
    for note in caught:
        logger.debug("%s: %s", what, note.message)


def visa_backends() -> list[str] | str:
    """Names of the VISA back ends pyvisa can load, or the error text."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            from pyvisa import highlevel

            found: list[str] | str = sorted(highlevel.list_backends())
        except Exception as exc:  # noqa: BLE001 - info must never fail
            found = f"unavailable ({type(exc).__name__}: {exc})"
    _log_notes("VISA back ends", caught)
    return found


def visa_resources(timeout_s: float = 5.0, library: str = "@py") -> list[str] | str:
    """Resources the ``library`` back end lists, or why it could not (bounded by a timeout)."""
    result: dict[str, Any] = {}

    def scan() -> None:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            try:
                import pyvisa

                manager = pyvisa.ResourceManager(library)
                try:
                    result["found"] = list(manager.list_resources())
                finally:
                    manager.close()
            except Exception as exc:  # noqa: BLE001
                result["error"] = f"{type(exc).__name__}: {exc}"
        result["notes"] = caught

    worker = threading.Thread(target=scan, name="noisebench-info-scan", daemon=True)
    worker.start()
    worker.join(timeout_s)
    if worker.is_alive():
        return f"no answer within {timeout_s:g} s"
    _log_notes("resource listing", result.get("notes", []))
    if "error" in result:
        return f"listing failed ({result['error']})"
    return result.get("found", [])


def _packaged(package: str, folder: str) -> list[str]:
    try:
        root = resources.files(package).joinpath(folder)
        return sorted(p.name[:-5] for p in root.iterdir() if p.name.endswith(".toml"))
    except Exception as exc:  # noqa: BLE001
        return [f"unavailable ({type(exc).__name__})"]


def collect_info(
    *, scan: bool = False, timeout_s: float = 5.0, ranges: bool = False
) -> dict[str, Any]:
    """Everything ``noisebench info`` prints, as a dict (``ranges``: with the rows of
    :func:`noisebench.science.ranges.describe_ranges`)."""
    from noisebench.science.ranges import describe_ranges

    return {
        "versions": versions(),
        "platform": platform.platform(),
        "visa_backends": visa_backends(),
        "resources": visa_resources(timeout_s)
        if scan
        else (
            "not scanned (noisebench info --scan lists them; it broadcasts on the local network)"
        ),
        "profiles": _packaged("noisebench.drivers", "profiles"),
        "scenarios": _packaged("noisebench.sims", "scenarios"),
        "ranges": describe_ranges() if ranges else None,
    }


def format_info(info: dict[str, Any]) -> str:
    lines = ["noisebench environment", f"  platform   {info['platform']}"]
    for name, version in info["versions"].items():
        lines.append(f"  {name:<11}{version}")
    for key, title in (
        ("visa_backends", "VISA back ends"),
        ("resources", "VISA resources (@py)"),
        ("profiles", "instrument profiles"),
        ("scenarios", "simulator scenarios"),
    ):
        value = info[key]
        if isinstance(value, str):
            lines.append(f"{title}: {value}")
        else:
            lines.append(f"{title}: " + (", ".join(value) if value else "none found"))
    lines.append(
        "simulated benches: sim://<scenario>?seed=N (in process), "
        "`noisebench serve` (SCPI over TCP)"
    )
    if info.get("ranges"):
        lines.append(format_ranges(info["ranges"]))
    else:
        lines.append("plausibility ranges of plan values: noisebench info --ranges")
    return "\n".join(lines)


RANGES_INTRO = (
    "plausibility ranges: a plan, ENR/gain/loss table or reading outside the plausible span is "
    "refused (the error names the field and the likely slip); outside the usual span it is "
    "accepted with one warning"
)


def format_ranges(rows: list[tuple[str, str, str, str, str]], width: int = 100) -> str:
    """The rows of :func:`noisebench.science.ranges.describe_ranges` as text: one block per
    quantity, its source and, where one exists, how to state an unusual value on purpose."""
    lines = textwrap.wrap(RANGES_INTRO, width)
    for key, refused, usual, source, purpose in rows:
        lines.append(f"  {key}: plausible {refused}; usual {usual}")
        lines += textwrap.wrap(
            f"source: {source}", width, initial_indent=" " * 6, subsequent_indent=" " * 8
        )
        if purpose:
            lines += textwrap.wrap(
                f"on purpose: {purpose}", width, initial_indent=" " * 6, subsequent_indent=" " * 8
            )
    return "\n".join(lines)
