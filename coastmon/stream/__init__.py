"""The one streaming pass over the big (time, y, x) data, and its mergeable accumulators."""

from coastmon.stream.moments import (
    FORMAT_VERSION,
    MomentState,
    grid_signature,
    load_state,
    merge_states,
    save_state,
)
from coastmon.stream.pass_ import (
    PassResult,
    SeriesFile,
    prestart_readers,
    run_pass,
    stats_from_state,
)

__all__ = [
    "FORMAT_VERSION",
    "MomentState",
    "PassResult",
    "SeriesFile",
    "grid_signature",
    "load_state",
    "merge_states",
    "prestart_readers",
    "run_pass",
    "save_state",
    "stats_from_state",
]
