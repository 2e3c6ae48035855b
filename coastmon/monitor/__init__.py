"""Keep watching: the incremental monitoring state (:mod:`coastmon.monitor.state`, used by
``coastmon update``) and the log of shedding events (:mod:`coastmon.monitor.events`).

The submodules are imported where they are used (the state pulls in the whole pipeline).
"""
