"""A wideband model at one bias as a Touchstone file, written with scikit-rf.

Network parameters from Z (reference Z0, 50 ohm unless told) [derived from network theory;
science notes, "Impedance against frequency"]:

    one port (.s1p):          S11 = (Z - Z0)/(Z + Z0)
    series-through (.s2p):    S11 = S22 = Z/(Z + 2*Z0),   S21 = S12 = 2*Z0/(Z + 2*Z0)
    shunt-through (.s2p):     S11 = S22 = -Z0/(Z0 + 2*Z), S21 = S12 = 2*Z/(2*Z + Z0)

Shunt-through (part from the line to ground) is how milliohm impedances are measured on a
network analyser [common practice]. Version 1 files carry the option line
`# Hz S RI R 50`; version 2.0 files add the keywords [Version], [Number of Ports],
[Two-Port Data Order], [Number of Frequencies], [Reference], [Network Data], [End]
[standard: Touchstone File Format Specification 2.0, IBIS Open Forum, 2009]. scikit-rf writes
both (its reader checks them in the tests).
"""

from __future__ import annotations

import numpy as np

from benchkit.errors import UserError

FIXTURES = ("one-port", "series-through", "shunt-through")
VERSIONS = ("1", "2")
DEFAULT_Z0_OHM = 50.0


def s_parameters(Z_ohm, fixture: str, z0_ohm: float = DEFAULT_Z0_OHM) -> np.ndarray:
    """S matrices (n, p, p) of the part in the named fixture (module docstring)."""
    Z = np.asarray(Z_ohm, dtype=complex).ravel()
    if fixture == "one-port":
        return ((Z - z0_ohm) / (Z + z0_ohm)).reshape(-1, 1, 1)
    if fixture == "series-through":
        s11, s21 = Z / (Z + 2 * z0_ohm), 2 * z0_ohm / (Z + 2 * z0_ohm)
    elif fixture == "shunt-through":
        s11, s21 = -z0_ohm / (z0_ohm + 2 * Z), 2 * Z / (2 * Z + z0_ohm)
    else:
        raise UserError(f"--fixture {fixture!r}: choose one of {', '.join(FIXTURES)}")
    S = np.empty((Z.size, 2, 2), dtype=complex)
    S[:, 0, 0] = S[:, 1, 1] = s11
    S[:, 1, 0] = S[:, 0, 1] = s21
    return S


def suffix(fixture: str, version: str) -> str:
    if version == "2":
        return ".ts"
    return ".s1p" if fixture == "one-port" else ".s2p"


def fixture_for(path_suffix: str, fixture: str | None) -> str:
    """The fixture a file name implies: .s1p is one port; .s2p needs --fixture named."""
    sfx = path_suffix.lower()
    if fixture is not None:
        if fixture not in FIXTURES:
            raise UserError(f"--fixture {fixture!r}: choose one of {', '.join(FIXTURES)}")
        if sfx == ".s1p" and fixture != "one-port" or sfx == ".s2p" and fixture == "one-port":
            raise UserError(f"--fixture {fixture} does not fit a {sfx} file; name the file "
                            f"{suffix(fixture, '1')} or choose another fixture")
        return fixture
    if sfx == ".s1p":
        return "one-port"
    raise UserError(f"{sfx or 'this file name'}: name the fixture with --fixture "
                    f"({', '.join(FIXTURES)}); .s2p files need series-through or shunt-through")


def touchstone_text(freq_Hz, Z_ohm, *, fixture: str = "one-port", version: str = "1",
                    z0_ohm: float = DEFAULT_Z0_OHM, comments: list[str] = ()) -> str:
    """The file text, written by scikit-rf (real/imaginary pairs, frequencies in Hz)."""
    import skrf

    if version not in VERSIONS:
        raise UserError(f"--touchstone-version {version!r}: choose 1 or 2")
    f = np.asarray(freq_Hz, dtype=float).ravel()
    if f.size < 1 or np.any(np.diff(f) <= 0) or np.any(f <= 0):
        raise UserError("Touchstone frequencies must be > 0 Hz and strictly ascending")
    S = s_parameters(Z_ohm, fixture, z0_ohm)
    net = skrf.Network(frequency=skrf.Frequency.from_f(f, unit="hz"), s=S, z0=z0_ohm, name="part")
    net.comments = "\n".join(" ".join(str(c).split()) for c in comments)
    text = net.write_touchstone(return_string=True, form="ri", skrf_comment=False,
                                version="1.0" if version == "1" else "2.0")
    return text if text.endswith("\n") else text + "\n"


# Keywords of a version 2.0 file in the order the specification requires them (those this
# writer emits) [standard: Touchstone File Format Specification 2.0, IBIS Open Forum, 2009;
# order from memory, checked against scikit-rf's reader].
V2_KEYWORD_ORDER = ("[Version]", "#", "[Number of Ports]", "[Two-Port Data Order]",
                    "[Number of Frequencies]", "[Reference]", "[Network Data]", "[End]")
