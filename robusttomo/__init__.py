"""robusttomo: SPAM-robust reconstruction of quantum gate error channels from random Clifford sequences.

The loop: :func:`make_plan` -> :func:`simulate` (or run on hardware and :func:`ingest` the
counts) -> :func:`analyze` -> report and export.  Lower-level stages:
:func:`estimate_decays` (SPAM-robust probe decays) and the modules ``reconstruct``,
``models``, ``metrics``, ``channels``, ``clifford``.

Threads: the hot paths are many small matrix operations, where multithreaded BLAS only adds
synchronization cost (on a loaded machine, 100x slower was measured).  If numpy has not been
imported yet, importing robusttomo defaults ``OPENBLAS_NUM_THREADS``, ``OMP_NUM_THREADS`` and
``MKL_NUM_THREADS`` to 1; set them yourself to override.
"""

import os as _os
import sys as _sys

if "numpy" not in _sys.modules:
    for _var in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS", "MKL_NUM_THREADS"):
        _os.environ.setdefault(_var, "1")

from robusttomo._version import __version__  # noqa: E402
from robusttomo.assess import Reconstruction, analyze, load_reconstruction, save_reconstruction  # noqa: E402
from robusttomo.channels import Channel  # noqa: E402
from robusttomo.clifford import Clifford, clifford_group_order, random_clifford  # noqa: E402
from robusttomo.counts import Counts, ingest, load_counts, save_counts  # noqa: E402
from robusttomo.errors import DataError  # noqa: E402
from robusttomo.estimate import default_probes  # noqa: E402
from robusttomo.export import export_channel, load_channel  # noqa: E402
from robusttomo.fit import DecayResult, LinearObservations, estimate_decays  # noqa: E402
from robusttomo.metrics import average_gate_fidelity, diamond_distance, entanglement_fidelity, unitarity  # noqa: E402
from robusttomo.plan import Plan, export_qasm, load_plan, make_plan, save_plan  # noqa: E402
from robusttomo.planner import assumed_device, choose_plan, predict  # noqa: E402
from robusttomo.report import write_report  # noqa: E402
from robusttomo.simulate import Device, load_device, save_device, simulate  # noqa: E402

__all__ = sorted([
    "Channel",
    "Clifford",
    "Counts",
    "DataError",
    "DecayResult",
    "Device",
    "LinearObservations",
    "Plan",
    "Reconstruction",
    "__version__",
    "analyze",
    "assumed_device",
    "average_gate_fidelity",
    "choose_plan",
    "clifford_group_order",
    "default_probes",
    "diamond_distance",
    "entanglement_fidelity",
    "estimate_decays",
    "export_channel",
    "export_qasm",
    "ingest",
    "load_channel",
    "load_counts",
    "load_device",
    "load_plan",
    "load_reconstruction",
    "make_plan",
    "predict",
    "random_clifford",
    "save_counts",
    "save_device",
    "save_plan",
    "save_reconstruction",
    "simulate",
    "unitarity",
    "write_report",
])
