"""Tokens, certificates and small slices for the access-control tests."""

from __future__ import annotations

import hashlib
import shutil
import subprocess
from pathlib import Path

import pytest

import penumbra_shim as ps
from penumbra_server.numerics.spacetimes import BrillLindquist, sample_patch

CENTRE = (0.013, -0.021, 0.017)
TOKENS = {"admin": "admin-token-for-the-tests-0001", "reader": "reader-token-for-the-tests-0002",
          "opener": "opener-token-for-the-tests-0003"}
#: A display name that would recolour a terminal, ring its bell and overwrite its line.
HOSTILE_NAME = "\x1b[31mred\x1b[0m run\x07\rX\x1b]0;title\x07"


def write_token_file(path: Path) -> Path:
    """A token file with the admin and opener tokens in the clear and the reader's as a digest."""
    reader_digest = hashlib.sha256(TOKENS["reader"].encode()).hexdigest()
    path.write_text(
        "# tokens of the access tests\n"
        f'[[token]]\nname = "ops"\nrole = "admin"\ntoken = "{TOKENS["admin"]}"\n\n'
        f'[[token]]\nname = "watcher"\nrole = "reader"\nsha256 = "{reader_digest}"\n\n'
        f'[[token]]\nname = "campaign"\nrole = "opener"\ntoken = "{TOKENS["opener"]}"\n'
    )
    return path


def small_slice(iteration: int, nodes: int = 13) -> ps.OutgoingSlice:
    """One puncture of mass 1 on a coarse cube (cheap for the finder)."""
    h = 2.4 / (nodes - 1)
    origin = tuple(c - 1.2 for c in CENTRE)
    patch = sample_patch(BrillLindquist(masses=(1.0,), positions=(CENTRE,)), origin=origin, spacing=(h, h, h),
                         shape=(nodes,) * 3, level=0, variable_set="adm", memory_order="C")
    fields = {k: v for k, v in patch.fields.items() if k in ps.required_fields("adm")}
    return ps.build_slice(time=0.1 * iteration, iteration=iteration, variable_set="adm",
                          patches=[ps.PatchData(origin=origin, spacing=(h, h, h), fields=fields)])


def spec(name: str = "access test") -> ps.RunSpec:
    return ps.RunSpec(variable_set="adm", bodies=(ps.Body("A", CENTRE, 1.0),), name=name,
                      finder=ps.FinderOptions(lmax=4, tolerance=1e-8))


def self_signed(directory: Path, name: str, *, ip: str | None = None) -> tuple[Path, Path]:
    """A self-signed certificate and its key (P-256) made with the openssl command-line tool."""
    openssl = shutil.which("openssl")
    if openssl is None:
        pytest.skip("neither the cryptography package nor the openssl command is available to make a certificate")
    cert, key = directory / f"{name}.crt", directory / f"{name}.key"
    command = [openssl, "req", "-x509", "-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes",
               "-keyout", str(key), "-out", str(cert), "-days", "2", "-subj", f"/CN={name}"]
    if ip is not None:
        command += ["-addext", f"subjectAltName=IP:{ip}"]
    subprocess.run(command, check=True, capture_output=True)
    return cert, key


def denied(call) -> ps.PenumbraError:
    """The PenumbraError ``call()`` raises (fails if it does not raise one)."""
    with pytest.raises(ps.PenumbraError) as caught:
        call()
    return caught.value
