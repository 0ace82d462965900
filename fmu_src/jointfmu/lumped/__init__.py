"""The discrete-joint structure and virtual ring-down tests.

A structure of lumped masses, springs and discrete four-parameter Iwan joints (:mod:`.model`, file
format ``jointfmu-lumped/1``), its stuck-joint modes and the modal-Iwan template they give
(:mod:`.modes`), its time integration with every joint exact (:mod:`.simulate`, the step in
:mod:`.kernel`, compiled by :mod:`.compiled`), and virtual hammer tests that write ring-down
records (:mod:`.virtual_test`).  The truth that identification is checked against: it does not
assume uncoupled modes.

Imports only :mod:`jointfmu.errors`, :mod:`jointfmu.fileio`, :mod:`jointfmu.params`,
:mod:`jointfmu.physics` and :mod:`jointfmu.records`.
"""
