"""The FMI 2.0 co-simulation FMU: the variable table (:mod:`.variables`), the slave
(:mod:`.slave`), the native binary's source (``native/``) and the host-side tools that build,
describe and run FMUs.

Only :mod:`.variables` and :mod:`.slave` travel inside an FMU; keep this file free of imports so
that the bundled copy of the package stays small.
"""
