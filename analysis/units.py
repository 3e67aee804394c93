"""Level and field-strength conversions, vectorised over scalars and arrays.

Every function takes a float or an array and returns the same shape (a float
for a scalar input). Levels are in dB relative to 1 µV, 1 mW, 1 µA, 1 µV/m,
1 µA/m or 1 pT as the names say; the relations are those of DOMAIN.md's units
table. Conversions that take a logarithm refuse non-positive values with a
TraceError rather than returning -inf or NaN.
"""

from __future__ import annotations

import math

import numpy as np

from analysis.errors import TraceError
from analysis.types import LEVEL_UNITS

ArrayLike = float | np.ndarray

DEFAULT_IMPEDANCE_OHM = 50.0
# Impedance of free space, 120π Ω ≈ 376.73 Ω ("377 Ω" in DOMAIN.md): the ratio
# of E to H of a plane wave, so it only holds in the far field.
FREE_SPACE_IMPEDANCE_OHM = 120.0 * math.pi
FREE_SPACE_IMPEDANCE_DB = 20.0 * math.log10(FREE_SPACE_IMPEDANCE_OHM)  # 51.52 dBΩ

_DBUV_PER_VOLT = 120.0  # 20·log10(1 V / 1 µV)


def _as_array(x: ArrayLike) -> np.ndarray:
    return np.asarray(x, dtype=np.float64)


def _out(result: np.ndarray) -> ArrayLike:
    # A 0-d result goes back as a plain float so scalar callers get a scalar.
    return float(result) if result.ndim == 0 else result


def _positive(x: np.ndarray, what: str) -> np.ndarray:
    if not np.all(x > 0):
        bad = x.flat[int(np.argmax(~(x > 0)))]
        raise TraceError(f"{what} must be positive to express it in dB, got {bad:g}")
    return x


def _impedance_db(impedance_ohm: float) -> float:
    if not (impedance_ohm > 0 and math.isfinite(impedance_ohm)):
        raise TraceError(f"impedance must be a positive number of ohms, got {impedance_ohm!r}")
    return 20.0 * math.log10(impedance_ohm)


def dbm_to_dbuv(level_dbm: ArrayLike, impedance_ohm: float = DEFAULT_IMPEDANCE_OHM) -> ArrayLike:
    """dBm → dBµV across ``impedance_ohm``: P = V²/R gives dBµV = dBm + 90 + 10·log10(R).

    In 50 Ω that is +106.99 dB (0 dBm = 0.2236 V rms).
    """
    return _out(_as_array(level_dbm) + 90.0 + _impedance_db(impedance_ohm) / 2.0)


def dbuv_to_dbm(level_dbuv: ArrayLike, impedance_ohm: float = DEFAULT_IMPEDANCE_OHM) -> ArrayLike:
    """dBµV → dBm across ``impedance_ohm`` (the inverse of :func:`dbm_to_dbuv`)."""
    return _out(_as_array(level_dbuv) - 90.0 - _impedance_db(impedance_ohm) / 2.0)


def _current_offset_db(
    impedance_ohm: float | None, transfer_impedance_dbohm: float | None
) -> float:
    if impedance_ohm is not None and transfer_impedance_dbohm is not None:
        raise TraceError("give either impedance_ohm or transfer_impedance_dbohm, not both")
    if transfer_impedance_dbohm is not None:
        if not math.isfinite(transfer_impedance_dbohm):
            raise TraceError("transfer_impedance_dbohm must be a finite number of dBΩ")
        return float(transfer_impedance_dbohm)
    return _impedance_db(DEFAULT_IMPEDANCE_OHM if impedance_ohm is None else impedance_ohm)


def dbuv_to_dbua(
    level_dbuv: ArrayLike,
    impedance_ohm: float | None = None,
    *,
    transfer_impedance_dbohm: float | None = None,
) -> ArrayLike:
    """dBµV → dBµA by Ohm's law: dBµA = dBµV − 20·log10(Z / 1 Ω).

    Z is ``impedance_ohm`` (50 Ω when neither argument is given), or a current
    probe's transfer impedance given directly in dBΩ as
    ``transfer_impedance_dbohm`` (a 10 Ω probe is 20 dBΩ).
    """
    offset = _current_offset_db(impedance_ohm, transfer_impedance_dbohm)
    return _out(_as_array(level_dbuv) - offset)


def dbua_to_dbuv(
    level_dbua: ArrayLike,
    impedance_ohm: float | None = None,
    *,
    transfer_impedance_dbohm: float | None = None,
) -> ArrayLike:
    """dBµA → dBµV, the inverse of :func:`dbuv_to_dbua` with the same arguments."""
    offset = _current_offset_db(impedance_ohm, transfer_impedance_dbohm)
    return _out(_as_array(level_dbua) + offset)


def dbuv_to_dbuvm(
    level_dbuv: ArrayLike,
    antenna_factor_db: ArrayLike,
    cable_loss_db: ArrayLike = 0.0,
    preamp_gain_db: ArrayLike = 0.0,
) -> ArrayLike:
    """Field strength from an antenna reading: dBµV/m = dBµV + AF + cable loss − preamp gain.

    The correction arguments broadcast against the level (a scalar or one value
    per frequency, e.g. from CorrectionTable.at).
    """
    return _out(
        _as_array(level_dbuv)
        + _as_array(antenna_factor_db)
        + _as_array(cable_loss_db)
        - _as_array(preamp_gain_db)
    )


def dbuvm_to_dbuv(
    field_dbuvm: ArrayLike,
    antenna_factor_db: ArrayLike,
    cable_loss_db: ArrayLike = 0.0,
    preamp_gain_db: ArrayLike = 0.0,
) -> ArrayLike:
    """The receiver reading a field would give: the inverse of :func:`dbuv_to_dbuvm`."""
    return _out(
        _as_array(field_dbuvm)
        - _as_array(antenna_factor_db)
        - _as_array(cable_loss_db)
        + _as_array(preamp_gain_db)
    )


def dbuvm_to_dbuam(field_dbuvm: ArrayLike) -> ArrayLike:
    """Electric field → magnetic field of a plane wave: dBµA/m = dBµV/m − 51.5.

    Valid in the far field only, where E/H is the free-space impedance.
    """
    return _out(_as_array(field_dbuvm) - FREE_SPACE_IMPEDANCE_DB)


def dbuam_to_dbuvm(field_dbuam: ArrayLike) -> ArrayLike:
    """Magnetic → electric field of a plane wave: dBµV/m = dBµA/m + 51.5 (far field)."""
    return _out(_as_array(field_dbuam) + FREE_SPACE_IMPEDANCE_DB)


def uv_per_m_to_dbuvm(field_uv_per_m: ArrayLike) -> ArrayLike:
    """µV/m → dBµV/m = 20·log10(E / 1 µV/m); E must be positive."""
    return _out(20.0 * np.log10(_positive(_as_array(field_uv_per_m), "a field strength")))


def dbuvm_to_uv_per_m(field_dbuvm: ArrayLike) -> ArrayLike:
    """dBµV/m → µV/m."""
    return _out(10.0 ** (_as_array(field_dbuvm) / 20.0))


def volts_to_dbuv(volts: ArrayLike) -> ArrayLike:
    """An rms voltage in V → dBµV = 20·log10(V / 1 µV); 1 V = 120 dBµV. V must be positive."""
    return _out(20.0 * np.log10(_positive(_as_array(volts), "a voltage")) + _DBUV_PER_VOLT)


def dbuv_to_volts(level_dbuv: ArrayLike) -> ArrayLike:
    """dBµV → rms volts."""
    return _out(10.0 ** ((_as_array(level_dbuv) - _DBUV_PER_VOLT) / 20.0))


# Every accepted spelling, reduced by _squash, mapped to (canonical unit, dB to add).
# The extra voltage references (dBV, dBmV) are what oscilloscope FFTs write;
# they become dBµV so the rest of the engine sees one of LEVEL_UNITS.
_LEVEL_SPELLINGS: dict[str, tuple[str, float]] = {
    "dbuv": ("dBuV", 0.0),
    "dbm": ("dBm", 0.0),
    "dbmw": ("dBm", 0.0),
    "dbuv/m": ("dBuV/m", 0.0),
    "dbua": ("dBuA", 0.0),
    "dbpt": ("dBpT", 0.0),
    "dbv": ("dBuV", 120.0),
    "dbmv": ("dBuV", 60.0),
}


def _squash(text: str) -> str:
    # Micro sign U+00B5 and Greek mu U+03BC both mean micro; "Â" before it is
    # UTF-8 read as Latin-1 somewhere upstream. Brackets and spaces carry no
    # meaning inside a unit: dB(µV), dB µV and dBµV are the same unit.
    text = text.replace("Âµ", "u").replace("\u00b5", "u").replace("\u03bc", "u")
    return "".join(ch for ch in text.lower() if ch not in " ()[]{}_\t\"'")


def parse_level_unit(text: str) -> tuple[str, float] | None:
    """Recognise a level unit in any accepted spelling.

    Returns ``(canonical, offset_db)``: the LEVEL_UNITS spelling and the dB to
    add to readings in ``text``'s unit (0 except dBV → dBµV +120 and
    dBmV → dBµV +60), or None when ``text`` is not a level unit.
    """
    return _LEVEL_SPELLINGS.get(_squash(text))


def normalise_level_unit(text: str) -> str | None:
    """The canonical LEVEL_UNITS spelling of ``text`` (dBµV, dB(uV), dBμV → "dBuV"), or None.

    Only units that are themselves in LEVEL_UNITS are accepted here; dBV and
    dBmV (which need an offset) are recognised by :func:`parse_level_unit`.
    """
    found = parse_level_unit(text)
    if found is None or found[1] != 0.0:
        return None
    return found[0]


def _require_level_unit(text: str, role: str) -> str:
    unit = normalise_level_unit(text)
    if unit is None:
        raise TraceError(
            f"unknown {role} level unit {text!r}; expected one of {', '.join(LEVEL_UNITS)}"
        )
    return unit


# dB to add to go from the unit to dBµV, for the units that need nothing but a
# load impedance: a power into R and a current through R.
def _to_dbuv_offset(unit: str, impedance_ohm: float) -> float:
    if unit == "dBuV":
        return 0.0
    if unit == "dBm":
        return 90.0 + _impedance_db(impedance_ohm) / 2.0
    return _impedance_db(impedance_ohm)  # dBuA


def convert_level(
    level: ArrayLike,
    from_unit: str,
    to_unit: str,
    impedance_ohm: float = DEFAULT_IMPEDANCE_OHM,
) -> ArrayLike:
    """Convert levels between dBm, dBµV and dBµA through a load of ``impedance_ohm``.

    Units may be given in any accepted spelling. Converting a unit to itself
    returns the values unchanged. Conversions that need more than an impedance
    (to or from a field strength, which needs an antenna or probe factor)
    raise TraceError saying what is missing.
    """
    src = _require_level_unit(from_unit, "source")
    dst = _require_level_unit(to_unit, "target")
    values = _as_array(level)
    if src == dst:
        return _out(values.copy())
    circuit = ("dBuV", "dBm", "dBuA")
    if src in circuit and dst in circuit:
        offset = _to_dbuv_offset(src, impedance_ohm) - _to_dbuv_offset(dst, impedance_ohm)
        return _out(values + offset)
    if {src, dst} == {"dBuV", "dBuV/m"}:
        raise TraceError(
            f"converting {src} to {dst} needs an antenna factor: "
            "use dbuv_to_dbuvm / dbuvm_to_dbuv with antenna_factor_db"
        )
    if {src, dst} & {"dBuV/m", "dBpT"}:
        raise TraceError(
            f"converting {src} to {dst} needs an antenna or probe factor (or a far-field "
            "assumption): it cannot be done from the level alone"
        )
    raise TraceError(f"cannot convert {src} to {dst}")
