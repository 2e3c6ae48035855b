"""Assessment of runs: comparison of two result folders (:mod:`coastmon.assess.compare`)
and the spin-up curve of the time mean (:mod:`coastmon.assess.spinup`).

The submodules are imported where they are used, so that the pipeline does not load the
plotting stack through this package.
"""
