"""System co-simulation: load cases, the active damper, the master loop over structures and
components (:mod:`.system`, :mod:`.components`), sweeps on Dask (:mod:`.sweep`)."""
