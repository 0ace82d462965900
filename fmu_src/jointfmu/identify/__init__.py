"""Identification: a fitted parameter set per hardware build, from its ring-down records.

:mod:`.process` (signal processing shared by records and simulated ring-downs),
:mod:`.closed_form` (the micro-slip closed-form start), :mod:`.fit` (the fit to simulated
ring-downs of the exact core, intervals, the macro-slip decision, the collapse measure) and
:mod:`.result` (the fitted parameter file and its ``.fit.json``).  Imports only downward:
errors, fileio, params, physics, records, analysis.

A fitted model is no substitute for qualification testing; defer to the applicable codes,
standards and licensed engineering practice.
"""
