"""Co-simulation: the structure FMU in a system with a loads model and a controller, and sweeps.

Modules, each one job, imported downward in this order:

* :mod:`.blocks`: the arithmetic of the loads model and the damper (standard library only; the
  loads and damper FMUs carry a copy);
* :mod:`.component`: the component contract of the master loop (``Component``) and the adapter
  for components written in Python (``PythonComponent``);
* :mod:`.loads`: load cases and their base-motion profiles, the loads model as a component;
* :mod:`.controller`: the active damper's settings and component;
* :mod:`.structures`: any FMU as a component (fmpy), a linear state-space structure, the
  equivalent-linear model of a build;
* :mod:`.master`: the master loop (``co_simulate``) over components and connections, the demo
  system (``SYSTEM_CONNECTIONS``, ``run_system``), settings, summaries, histories;
* :mod:`.components`: the loads model and the damper built as FMUs, the system of three FMUs;
* :mod:`.ssp`: the demo system as an SSP 1.0 package;
* :mod:`.runs`: one system run as a self-contained task (``run_case``);
* :mod:`.sweep`: many tasks on Dask, result tables.
"""
