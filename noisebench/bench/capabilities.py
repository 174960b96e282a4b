"""Optional capabilities a back end declares by inheriting from one of these small interfaces.

The core asks ``isinstance(instrument, NoiseDriveOutput) and instrument.has_noise_drive`` instead of
guessing from attribute names, so a capability is either declared (and typed) or absent.

- :class:`NoiseDriveOutput`: an analyzer with a switched output that drives a noise source
  (the SCPI analyzer when its profile names the commands; the simulated analyzer).
- :class:`PathSwitch`: an analyzer whose input path (DUT, THROUGH, termination) can be chosen by
  command (the simulators only: on a real bench the operator moves the cables).

Checks of an address before anything is opened (a simulated bench's frequency range, its
scenario) belong to the back end and are reached through
:func:`noisebench.bench.registry.address_problems`.
"""

from __future__ import annotations

from abc import ABC, abstractmethod


class NoiseDriveOutput(ABC):
    """A switched supply output for a noise source (on = hot)."""

    @property
    def has_noise_drive(self) -> bool:
        """True when the output can be used (e.g. the profile defines its commands)."""
        return True

    @abstractmethod
    def set_noise_drive(self, on: bool) -> None:
        """Switch the noise-source drive output on (hot) or off (cold)."""


class PathSwitch(ABC):
    """An input path chosen by command: ``"dut"``, ``"through"`` or ``"termination"``."""

    @property
    def has_path_switch(self) -> bool:
        """True when the path command can be used on this instrument."""
        return True

    @abstractmethod
    def set_path(self, path: str) -> None:
        """Put the analyzer input on ``path`` (``dut``/``through``/``termination``)."""
