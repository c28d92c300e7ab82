"""Shared constants at the bottom of the import layers: Pauli letters and matrices, probes, conventions, version.

Every module that needs the Pauli basis, the probe letters, the conventions text written into output files or
the package version takes them from here, so none of them has to import a module above it.
"""

from __future__ import annotations

from importlib.metadata import PackageNotFoundError, version as _version

import numpy as np

__all__ = ["LETTERS", "PAULI", "SPIN", "PROBES", "ANTICOMMUTES", "LETTER_PARITY", "CONVENTIONS", "__version__"]

try:
    __version__ = _version("mpo-fronts")
except PackageNotFoundError:  # pragma: no cover - running from a source tree without installation
    __version__ = "0.1.0+unknown"

#: Single-site Pauli letters, in the order of the letter axis of every operator tensor and weights array.
LETTERS = "IXYZ"
#: The single-site Pauli matrices in the order I, X, Y, Z used everywhere in the package.
PAULI = np.stack([np.eye(2, dtype=complex),
                  np.array([[0, 1], [1, 0]], dtype=complex),
                  np.array([[0, -1j], [1j, 0]], dtype=complex),
                  np.array([[1, 0], [0, -1]], dtype=complex)])
PAULI.setflags(write=False)
#: Spin-1/2 operators S^x, S^y, S^z = sigma / 2.
SPIN = PAULI[1:] / 2
SPIN.setflags(write=False)
#: Probes V of the OTOC.
PROBES = ("X", "Y", "Z")
#: ANTICOMMUTES[v][a] is True when the Pauli letter a (I, X, Y, Z) anticommutes with probe v.
ANTICOMMUTES = {
    "X": np.array([False, False, True, True]),
    "Y": np.array([False, True, False, True]),
    "Z": np.array([False, True, True, False]),
}
for _a in ANTICOMMUTES.values():
    _a.setflags(write=False)
#: Number of X/Y letters mod 2 of each letter (the Z2 charge conserved when H commutes with total S^z).
LETTER_PARITY = np.array([0, 1, 1, 0], dtype=np.int8)
LETTER_PARITY.setflags(write=False)

CONVENTIONS = (
    "spin-1/2 operators S = sigma/2, hbar = 1, open chain, sites 0..L-1, time in units of 1/J; "
    "XXZ: H = sum J (SxSx + SySy + delta SzSz) + sum h_i Sz_i, h_i uniform in [-W, W]; "
    "mixed-field Ising (Pauli units): H = sum J ZZ + g X + h Z; "
    "C(r,t) = 1 - Re Tr[W(t) V_r W(t) V_r]/2^L in [0, 2]; product state: 1 - Re <s|W(t) V_r W(t) V_r|s>, "
    "'0' = spin up (Z = +1); MPO over Pauli letters I, X, Y, Z with unit Frobenius weight"
)


def default_probe(probes) -> str:
    """The probe V used when none is named: Z if it is stored, else the first stored one (the same default in
    ``converge``, ``summary``, ``plot`` and the demo, so that a convergence study's trust map applies)."""
    probes = [str(p).upper() for p in probes]
    return "Z" if "Z" in probes else probes[0]
