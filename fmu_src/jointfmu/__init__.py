"""jointfmu: modal Iwan models of bolted, jointed structures as FMI 2.0 co-simulation FMUs.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.

The public names are those of :mod:`.errors` and :mod:`.params` (their ``__all__``) and the
physics core below.  Everything else is used from its layer's subpackage: ``jointfmu.records``
(ring-down record files), ``.fmu`` (build, info, run, ssv), ``.analysis`` (characterize, runners,
summary, linear), ``.lumped`` (discrete-joint structures), ``.identify`` (fitting records),
``.cosim`` (master loop, components, sweep, SSP export), ``.report`` (pages), ``.cli``.
This file travels inside every FMU: it imports nothing above params and physics.
"""
from . import errors as _errors
from . import params as _params
from .errors import *  # noqa: F401,F403 - exactly errors.__all__
from .physics.integrate import DEFAULT_STEPS_PER_PERIOD, ModalSimulator, kernel_info
from .physics.iwan import IwanJoint, backbone, backbone_tangent, dissipation_per_cycle, joint_constants
from .physics.modal import ModalModel
from .params import *  # noqa: F401,F403 - exactly params.__all__

__version__ = "0.1.0"

__all__ = [
    "__version__",
    *_errors.__all__,
    *_params.__all__,
    "IwanJoint",
    "backbone",
    "backbone_tangent",
    "dissipation_per_cycle",
    "joint_constants",
    "ModalModel",
    "ModalSimulator",
    "DEFAULT_STEPS_PER_PERIOD",
    "kernel_info",
]
