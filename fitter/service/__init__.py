"""Platebook's service layer: the one door to the engine for every front end.

Each use case is a function that takes a plain specification with field names (a stage, a
position, a tolerance, a file) and returns a result object with ``to_dict()``.  The command
line (:mod:`fitter.cli`) and the web front end (:mod:`web`) parse their input into such a
specification, call the function, and render the result; neither holds numerics or file
handling of its own.  Errors are :class:`fitter.errors.InputError` carrying the field they are
about; each front end names that field its own way (``--ra``, a form field) from one table.

Modules:

* :mod:`fitter.service.stock`: the stock ledger's use cases (import, re-test, grade, match
  from stock, reserve, back up).
* :mod:`fitter.service.fitting`: read, check and fit curve files (:class:`FitSpec` ->
  :class:`FitRun`, whose ``to_dict()`` is the ``fit --json`` envelope); a unit's figures at
  one operating point (:func:`point`).
* :mod:`fitter.service.stages`: a stage, a spread over a lot (a stack pairs each tube's two
  sections), distortion at a level or swept, and the load lines of a solved stage.
* :mod:`fitter.service.export`: a card as a SPICE subcircuit, a model card or CSV curves.
* :mod:`fitter.service.specs`: :class:`SpecError` (a field of a specification) and
  :class:`NoResult` (valid input without a result), shared by the use cases.
* :mod:`fitter.service.matching`: matching (``match``: pairs, quads, a slot of a stack, or
  stacked assignment, from a fit file, a folder of cards or the units themselves).
"""
