"""Tell a damaged stored chunk from a bug, when a storage library fails to decode it.

The libraries that decode chunks coastmon does not decode itself (Zarr's codecs through
numcodecs, the netCDF4 library) raise plain ``RuntimeError``/``ValueError`` on corrupt or
truncated bytes. Those are the user's data, not a bug: they become one clear
:class:`~coastmon.errors.InputError`. An error is taken as such when it was raised inside
one of those decoders (its traceback passes through them) or is a ``zlib.error``.
"""

from __future__ import annotations

import logging
import warnings
import zlib

_DECODER_PATHS = ("numcodecs", "/zarr/codecs/", "/zarr/core/codec", "_netCDF4", "blosc",
                  "zstd", "lz4")


def decode_failure(exc: BaseException) -> bool:
    """Whether ``exc`` was raised while a storage library decoded stored bytes.

    When it was, the run is about to stop: the reads the library had started beside the
    failed one (Zarr decodes chunks in asyncio tasks) are abandoned, and asyncio's
    "Task was destroyed but it is pending" log lines and "coroutine was never awaited"
    warnings at exit are silenced.
    """
    found = isinstance(exc, zlib.error)
    tb = exc.__traceback__ if isinstance(exc, RuntimeError | ValueError | TypeError) else None
    while tb is not None and not found:
        name = tb.tb_frame.f_code.co_filename.replace("\\", "/")
        found = any(part in name for part in _DECODER_PATHS)
        tb = tb.tb_next
    if found:
        logging.getLogger("asyncio").setLevel(logging.CRITICAL)
        warnings.filterwarnings("ignore", message="coroutine .* was never awaited",
                                category=RuntimeWarning)
    return found


class ChunkDecodeError(Exception):
    """A stored chunk could not be decoded (raised by the readers, turned by the pass into
    an InputError naming the file and time steps)."""


__all__ = ["ChunkDecodeError", "decode_failure"]
