"""The physics: the exact four-parameter Iwan joint (:mod:`.iwan`, :mod:`.kernel`, compiled by
:mod:`.compiled`), the modal model (:mod:`.modal`), its time stepping (:mod:`.integrate`), the stepping contract
(:mod:`.stepping`) and the independent SciPy reference (:mod:`.reference`).

Imports :mod:`jointfmu.params` and :mod:`jointfmu.errors` only; never pythonfmu or fmpy.
"""
