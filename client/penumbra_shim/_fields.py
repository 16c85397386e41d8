"""Variable sets: their names, their wire enum values, and the fields each one carries.

This is the shim's one table between variable-set names and wire values (building slices and
run specs, and reading run specs back, all use it). The server keeps its own tables, wire
values in ``penumbra_server.server._spec`` and fields in ``penumbra_server.numerics.slices``;
tests check the two sides agree. The shim does not import the server (it must run with grpcio,
protobuf and numpy only).
"""

from __future__ import annotations

from ._errors import UnknownWireValueError
from ._wire import horizons_pb2 as pb

__all__ = [
    "VARIABLE_SETS",
    "VARIABLE_SET_WIRE",
    "SYMMETRIC_SUFFIXES",
    "required_fields",
    "optional_fields",
    "check_variable_set",
    "variable_set_from_wire",
]

#: Variable-set name -> ``penumbra.v1.VariableSet`` wire value.
VARIABLE_SET_WIRE: dict[str, int] = {
    "adm": pb.VARIABLE_SET_ADM,
    "conformal_chi": pb.VARIABLE_SET_CONFORMAL_CHI,
    "conformal_w": pb.VARIABLE_SET_CONFORMAL_W,
    "conformal_phi": pb.VARIABLE_SET_CONFORMAL_PHI,
}
_VARIABLE_SET_NAMES: dict[int, str] = {wire: name for name, wire in VARIABLE_SET_WIRE.items()}
#: Variable sets by name, as the server accepts them.
VARIABLE_SETS: tuple[str, ...] = tuple(VARIABLE_SET_WIRE)
#: Suffixes of the six independent components of a symmetric 3-tensor, in storage order.
SYMMETRIC_SUFFIXES: tuple[str, ...] = ("xx", "xy", "xz", "yy", "yz", "zz")

_CONFORMAL_FACTOR = {"conformal_chi": "chi", "conformal_w": "W", "conformal_phi": "phi"}
_GAUGE = ("lapse", "shift_x", "shift_y", "shift_z")


def _tensor(stem: str) -> tuple[str, ...]:
    return tuple(f"{stem}_{s}" for s in SYMMETRIC_SUFFIXES)


def check_variable_set(variable_set: str) -> str:
    """The variable set's name; ValueError naming the allowed ones otherwise."""
    if variable_set not in VARIABLE_SETS:
        raise ValueError(f"variable_set: unknown value {variable_set!r}; expected one of {', '.join(VARIABLE_SETS)}")
    return variable_set


def variable_set_from_wire(value: int, field: str = "variable_set") -> str:
    """The name of a wire variable-set value; :class:`UnknownWireValueError` naming ``field``
    for a value this shim has no name for (never a silent default)."""
    try:
        return _VARIABLE_SET_NAMES[int(value)]
    except KeyError:
        known = ", ".join(f"{name} ({wire})" for name, wire in VARIABLE_SET_WIRE.items())
        raise UnknownWireValueError(
            f"{field}: the server sent variable set {int(value)}, which this shim does not know; "
            f"expected one of {known} (a newer server? upgrade penumbra_shim)") from None


def required_fields(variable_set: str) -> tuple[str, ...]:
    """Fields every patch of a slice in this variable set must carry.

    ADM: gamma_xx..gamma_zz, K_xx..K_zz. Conformal: the conformal factor (chi, W or phi),
    gamma_tilde_xx..zz, A_tilde_xx..zz and trace_K.
    """
    check_variable_set(variable_set)
    if variable_set == "adm":
        return _tensor("gamma") + _tensor("K")
    return (_CONFORMAL_FACTOR[variable_set],) + _tensor("gamma_tilde") + _tensor("A_tilde") + ("trace_K",)


def optional_fields(variable_set: str) -> tuple[str, ...]:
    """Gauge fields a patch may carry: lapse, shift_x, shift_y, shift_z."""
    check_variable_set(variable_set)
    return _GAUGE
