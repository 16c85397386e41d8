"""Names of the fields each variable set carries (the shim's own copy of the table).

The server keeps the same table in ``penumbra_server.numerics.slices``; a test checks the two
agree. The shim does not import the server (it must run with grpcio, protobuf and numpy only).
"""

from __future__ import annotations

__all__ = ["VARIABLE_SETS", "SYMMETRIC_SUFFIXES", "required_fields", "optional_fields", "check_variable_set"]

#: Variable sets by name, as the server accepts them.
VARIABLE_SETS: tuple[str, ...] = ("adm", "conformal_chi", "conformal_w", "conformal_phi")
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
