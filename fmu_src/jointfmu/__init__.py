"""jointfmu: modal Iwan models of bolted, jointed structures as FMI 2.0 co-simulation FMUs.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
from .errors import (BuildError, InputError, JointFmuError, ParameterError, Problem,
                     SimulationError)
from .params import (FORMAT, MODE_VALUE_NAMES, ROLES, Base, JointParams, Mode, ParameterSet, Point,
                     Provenance, check_mode_values, check_parameter_file, load_parameter_set,
                     parse_parameter_set, save_parameter_set)

from .integrate import DEFAULT_STEPS_PER_PERIOD, ModalSimulator, kernel_info
from .iwan import IwanJoint, backbone, backbone_tangent, dissipation_per_cycle, joint_constants
from .modal import ModalModel

__version__ = "0.1.0"

__all__ = [
    "__version__",
    # errors
    "JointFmuError",
    "Problem",
    "ParameterError",
    "InputError",
    "SimulationError",
    "BuildError",
    # params
    "FORMAT",
    "ROLES",
    "MODE_VALUE_NAMES",
    "JointParams",
    "Mode",
    "Point",
    "Base",
    "Provenance",
    "ParameterSet",
    "parse_parameter_set",
    "load_parameter_set",
    "save_parameter_set",
    "check_parameter_file",
    "check_mode_values",
    # the physics core (the FMU, reports, sweeps and linear models are in their modules:
    # jointfmu.build, .report, .sweep, .system, .linear, .characterize, .reference)
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
