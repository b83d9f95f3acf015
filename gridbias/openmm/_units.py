"""Units at the adapter's boundary: openmm.unit quantities in, plain numbers in OpenMM's default units out.

OpenMM's default units (its ``md_unit_system``) are nm, ps, kJ/mol, K, rad and dalton; the core takes
bare numbers in exactly these. Every quantity that enters gridbias (a user's parameter, a State's
positions, a particle mass, an integrator's temperature) goes through :func:`in_md_units`, so nothing
reads a quantity's private storage.
"""

from __future__ import annotations

from ..errors import ParameterError

__all__ = ["is_quantity", "in_md_units", "cv_unit_name", "per_cv"]


def is_quantity(x) -> bool:
    """True for an ``openmm.unit`` quantity (checked without importing OpenMM)."""
    return hasattr(x, "value_in_unit_system") and hasattr(x, "unit")


def in_md_units(value, *, name: str | None = None, unit: str | None = None):
    """``value`` in OpenMM's default units; quantities are converted, bare numbers are taken as they are.

    Parameters
    ----------
    value : quantity, number, array or sequence
    name : str, optional
        The parameter's name, for error messages.
    unit : str or openmm.unit.Unit, optional
        A unit, or the name of one in ``openmm.unit`` (``"nanometer"``, ``"radian"``, ...), in OpenMM's
        default units. When given, a quantity must be compatible with it and the result is one float (a
        bare number is taken to be in this unit).

    Returns
    -------
    float when ``unit`` is given, else the quantity's value (number, array or list) in default units.

    Raises
    ------
    ParameterError
        An incompatible quantity, or (with ``unit``) something that is not a number.
    """
    if is_quantity(value):
        if unit is not None:
            from openmm import unit as openmm_unit

            target = getattr(openmm_unit, unit) if isinstance(unit, str) else unit
            if not value.unit.is_compatible(target):
                raise ParameterError(f"{name} must be in units compatible with {unit}, got {value}")
            return float(value.value_in_unit(target))
        from openmm import unit as openmm_unit

        return value.value_in_unit_system(openmm_unit.md_unit_system)
    if unit is None:
        return value
    try:
        return float(value)
    except (TypeError, ValueError):
        raise ParameterError(f"{name} must be a number ({unit}) or an openmm.unit quantity, "
                             f"got {value!r}") from None


def cv_unit_name(cv) -> str | None:
    """The ``openmm.unit`` name of a CV's unit ("nanometer", "radian"), or None for other units."""
    return {"nm": "nanometer", "rad": "radian"}.get(cv.unit)


def per_cv(name: str, values, cvs) -> list:
    """A per-CV sequence (CV units) as floats; each entry, or the whole sequence, may be a quantity."""
    if is_quantity(values):  # a quantity wrapping a list, or one value
        raw = values.value_in_unit(values.unit)
        values = [values.unit * v for v in raw] if hasattr(raw, "__len__") else [values]
    seq = list(values) if hasattr(values, "__len__") else [values]
    if len(seq) != len(cvs):
        raise ParameterError(f"{name} must have {len(cvs)} entries (one per CV), got {len(seq)}")
    out = []
    for i, (v, cv) in enumerate(zip(seq, cvs, strict=True)):
        unit_name = cv_unit_name(cv)
        if unit_name is None:
            if is_quantity(v):
                raise ParameterError(f"{name}[{i}]: CV {i} has unit {cv.unit!r}; give a bare number")
            out.append(float(v))
        else:
            out.append(in_md_units(v, name=f"{name}[{i}]", unit=unit_name))
    return out
