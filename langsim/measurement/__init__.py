"""What instruments report: camera frames and tracks, a position detector, and scoring.

Submodules (imported on use, so that ``import langsim`` stays cheap):

- :mod:`~langsim.measurement.formulas` -- closed forms: blur coefficient of a shutter,
  displacement moments, Wong-Halvorsen blur of a trap, camera-spot Fisher information
- :mod:`~langsim.measurement.spec` -- the ``[measurement]`` table: parsing and validation
- :mod:`~langsim.measurement.placement` -- emitters spread over the field of view
"""
