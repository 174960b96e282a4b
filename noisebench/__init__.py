"""noisebench: automated noise-figure and gain measurement (gain method and Y-factor) with a
spectrum analyzer, over SCPI or on a simulated bench.

The names a lab uses are importable from here; each is loaded on first use, so
``import noisebench`` is cheap and imports no instrument back end (the simulator is loaded only
when ``noisebench.SimulatedBench`` is asked for)::

    import noisebench as nb

    plan = nb.load_plan("my_plan.toml")
    record, folder = nb.run_plan(plan)
    print(nb.load_run(folder).points[0].nf_db)
"""

from __future__ import annotations

from importlib import import_module
from typing import TYPE_CHECKING, Any

__version__ = "0.1.0"

_EXPORTS: dict[str, str] = {
    # plans and runs
    "load_plan": "noisebench.running.plan",
    "Plan": "noisebench.running.plan",
    "PlanError": "noisebench.running.plan",
    "run_plan": "noisebench.running.sequencer",
    "Sequencer": "noisebench.running.sequencer",
    "load_run": "noisebench.results.store",
    "RunRecord": "noisebench.results.store",
    # measurement science
    "estimate_density": "noisebench.science.estimator",
    "NoiseDensity": "noisebench.science.density",
    "PointResult": "noisebench.science.point",
    "calibrate_point": "noisebench.science.methods",
    "y_factor_point": "noisebench.science.methods",
    "y_factor_sweep": "noisebench.science.methods",
    "gain_method_point": "noisebench.science.methods",
    "gain_method_nf_db": "noisebench.science.methods",
    "EnrTable": "noisebench.science.enr",
    # benches
    "open_bench": "noisebench.bench.registry",
    "open_analyzer": "noisebench.drivers",
    "SimulatedBench": "noisebench.sims.bench",
    "AcquisitionRequest": "noisebench.bench.acquisition",
    # errors
    "NoisebenchError": "noisebench.errors",
    "InputError": "noisebench.errors",
    "MeasurementError": "noisebench.errors",
    "CommunicationError": "noisebench.errors",
    "InstrumentTimeout": "noisebench.errors",
    "InstrumentError": "noisebench.errors",
    "SafetyError": "noisebench.errors",
}

__all__ = ["__version__", *sorted(_EXPORTS)]


def __getattr__(name: str) -> Any:
    """Load an exported name from its module on first use (PEP 562)."""
    module = _EXPORTS.get(name)
    if module is None:
        raise AttributeError(f"module 'noisebench' has no attribute {name!r}")
    value = getattr(import_module(module), name)
    globals()[name] = value  # later look-ups skip this function
    return value


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_EXPORTS))


if TYPE_CHECKING:  # the same names, visible to type checkers and editors
    from noisebench.bench.acquisition import AcquisitionRequest as AcquisitionRequest
    from noisebench.bench.registry import open_bench as open_bench
    from noisebench.drivers import open_analyzer as open_analyzer
    from noisebench.errors import CommunicationError as CommunicationError
    from noisebench.errors import InputError as InputError
    from noisebench.errors import InstrumentError as InstrumentError
    from noisebench.errors import InstrumentTimeout as InstrumentTimeout
    from noisebench.errors import MeasurementError as MeasurementError
    from noisebench.errors import NoisebenchError as NoisebenchError
    from noisebench.errors import SafetyError as SafetyError
    from noisebench.results.store import RunRecord as RunRecord
    from noisebench.results.store import load_run as load_run
    from noisebench.running.plan import Plan as Plan
    from noisebench.running.plan import PlanError as PlanError
    from noisebench.running.plan import load_plan as load_plan
    from noisebench.running.sequencer import Sequencer as Sequencer
    from noisebench.running.sequencer import run_plan as run_plan
    from noisebench.science.density import NoiseDensity as NoiseDensity
    from noisebench.science.enr import EnrTable as EnrTable
    from noisebench.science.estimator import estimate_density as estimate_density
    from noisebench.science.methods import calibrate_point as calibrate_point
    from noisebench.science.methods import gain_method_nf_db as gain_method_nf_db
    from noisebench.science.methods import gain_method_point as gain_method_point
    from noisebench.science.methods import y_factor_point as y_factor_point
    from noisebench.science.methods import y_factor_sweep as y_factor_sweep
    from noisebench.science.point import PointResult as PointResult
    from noisebench.sims.bench import SimulatedBench as SimulatedBench
