"""Unit strings of CF files (UDUNITS syntax) read with pint.

CF files write units in UDUNITS syntax: ``"m s-1"``, ``"cm/s"``, ``"meter second-1"``,
``"m.s-1"``, ``"m s^-1"``. pint reads products written with ``*`` and powers written with
``**``, so :func:`udunits_to_pint` rewrites the UDUNITS forms first: a space or a ``.``
between two factors is a product, a trailing signed integer (``s-1``, ``m2``) or ``^n``
is a power. :func:`scale_factor` then gives the number that converts values to the wanted
SI unit, or raises :class:`~coastmon.errors.InputError` when the unit is unknown or has the
wrong dimension.
"""

from __future__ import annotations

import re
from functools import lru_cache
from typing import TYPE_CHECKING

from coastmon.errors import InputError

if TYPE_CHECKING:
    import pint

_POWER = re.compile(r"^([A-Za-z_]+)(\^|\*\*)?([+-]?\d+)$")
_SEPARATOR = re.compile(r"(?<=[A-Za-z0-9_])\.(?=[A-Za-z_])")


@lru_cache(maxsize=1)
def _registry() -> pint.UnitRegistry:
    import pint  # half a second with its registry: only for units that need converting

    return pint.UnitRegistry()


def udunits_to_pint(units: str) -> str:
    """Rewrite a UDUNITS unit string in the syntax pint parses.

    Parameters
    ----------
    units : str
        For example ``"m s-1"``, ``"cm/s"``, ``"meter second-1"``, ``"m.s-1"``, ``"m s^-1"``.

    Returns
    -------
    str
        The same unit with explicit products and powers, e.g. ``"m * s**-1"``.

    Examples
    --------
    >>> udunits_to_pint("m s-1")
    'm * s**-1'
    >>> udunits_to_pint("cm/s")
    'cm / s'
    """
    text = _SEPARATOR.sub(" ", units.strip())
    text = text.replace("/", " / ")
    out: list[str] = []
    for token in text.split():
        if token in ("*", "/"):
            out.append(token)
            continue
        match = _POWER.match(token)
        if match:
            name, _, power = match.groups()
            token = f"{name}**{int(power)}"
        if out and out[-1] not in ("*", "/"):
            out.append("*")
        out.append(token)
    return " ".join(out)


def scale_factor(units: str | None, target: str, where: str, default: str | None = None) -> float:
    """Multiplier that converts values in ``units`` to ``target`` (e.g. ``"m s-1"``).

    Parameters
    ----------
    units : str or None
        The ``units`` attribute of the variable; None or empty uses ``default``.
    target : str
        The unit wanted (UDUNITS or pint syntax).
    where : str
        File and variable, named in the error message.
    default : str, optional
        Unit assumed when the variable has none; without it a missing unit is an error.

    Raises
    ------
    InputError
        When the unit is unknown to pint, has no multiplicative conversion, or measures
        another quantity than ``target``.
    """
    if units is None or not str(units).strip():
        if default is None:
            raise InputError(
                f"The variable has no units attribute; coastmon needs to know it is in {target}",
                where=where,
                todo=f"Add a units attribute (for example '{target}') to the variable",
            )
        units = default
    if udunits_to_pint(str(units)) == udunits_to_pint(target):
        return 1.0  # the same unit spelled the same way: nothing to convert
    ureg = _registry()
    import pint

    try:
        source = ureg.Quantity(1.0, udunits_to_pint(str(units)))
        return float(source.to(udunits_to_pint(target)).magnitude)
    except pint.DimensionalityError:
        raise InputError(
            f"The units '{units}' do not measure the same quantity as {target}",
            where=where,
            todo="Check that the right variable was chosen, or correct its units attribute",
        ) from None
    except Exception:  # pint raises many kinds (parse, tokenizer, undefined, offset units)
        raise InputError(
            f"The units '{units}' are not recognised",
            where=where,
            todo=f"Write the units in UDUNITS form (for example '{target}') in the file's "
                 "units attribute",
        ) from None
