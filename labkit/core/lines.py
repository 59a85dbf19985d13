"""Line models and two-port (ABCD) algebra: pi sections, full-scale lines, per-unit scaling, branches.

Everything is numpy and vectorized: a :class:`TwoPort` holds one complex array
of shape ``(..., 2, 2)``, so stacks of frequencies, Monte Carlo samples or
configurations are handled in one call.

Conventions
    ``[Vs, Is] = [[A, B], [C, D]] @ [Vr, Ir]``: ``Is`` flows *into* the sending
    port, ``Ir`` flows *out of* the receiving port (towards the load). RMS
    phasors, SI units (ohm, S, H, F, m, rad/s). The nodal admittance matrix
    :meth:`TwoPort.to_y` uses currents flowing *into* both ports, the form a
    network builder stamps.
Pi sections
    A pi section is a series impedance ``Z`` with shunt admittances ``Y/2`` at
    each end (``pi(Z, Y/2)``); bench sections give their total shunt
    capacitance ``C`` (``C/2`` at each end).
Shapes
    Section parameters (R, L, C, G) may be arrays of a *sample shape* ``P``
    (e.g. ``(n_samples,)``); angular frequencies an array of shape ``W``.
    Frequency-dependent results have shape ``P + W`` (parameters first, then
    frequencies), two-ports ``P + W + (2, 2)``.

Per-unit scaling (:func:`scale_to_bench`, :func:`scale_to_full_scale`)
    Impedance base ``Zbase = V**2 / S`` on each side; series impedances scale
    by ``Zbase_bench / Zbase_full_scale``, shunt admittances by its inverse.
    Reactances become inductance and capacitance at the *full-scale*
    frequency, so a bench run at the full-scale frequency shows the same
    per-unit values; at another bench frequency the per-unit reactances and
    X/R change, and the scaling result says so.

Formulas: common textbook line theory (long-line ABCD, equivalent and nominal pi),
see ``/work/shared/field-reference.md`` section 2.1 of the project notes.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, replace
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray

from labkit.core.bench import Bench, LineBranch, LineScaling, LineSection
from labkit.core.errors import ModelInputError, UnknownNameError, did_you_mean

ComplexArray = NDArray[np.complex128]
FloatArray = NDArray[np.float64]
PiModel = Literal["nominal_pi", "exact_pi"]

__all__ = [
    "BenchLumped",
    "BranchLayout",
    "FullScaleEquivalent",
    "ScalingBases",
    "SectionStamp",
    "SectionValues",
    "TwoPort",
    "abcd_to_y",
    "bench_section_values",
    "branch_admittance",
    "branch_layout",
    "branch_two_port",
    "characteristic_impedance",
    "internal_node_name",
    "line_equivalent_pi",
    "line_nominal_pi",
    "parallel",
    "path_two_port",
    "pi_to_abcd",
    "position_layout",
    "position_paths",
    "propagation_constant",
    "scale_to_bench",
    "scale_to_full_scale",
    "section_pi",
    "section_values",
    "surge_impedance",
    "surge_impedance_loading",
    "voltage_regulation",
    "y_to_abcd",
]

OPEN_POSITION = "open"
"""The implicit position of every line branch in which no path is connected."""

_RECIPROCITY_RTOL = 1e-9  # AD - BC = 1 to this relative accuracy for a passive reciprocal two-port
_SERIES_CUTOFF = 1e-4  # below |x| = 1e-4 the Taylor series of sinh(x)/x, tanh(x)/x is exact to ~1e-24


# -- input checks ---------------------------------------------------------------------------------
def _as_complex(value: ArrayLike, name: str) -> ComplexArray:
    try:
        arr = np.asarray(value, dtype=np.complex128)
    except (TypeError, ValueError):
        msg = f"{name}: expected a complex number or array, found {value!r}"
        raise ModelInputError(msg) from None
    if not np.all(np.isfinite(arr)):
        msg = f"{name}: expected finite values, found {arr[~np.isfinite(arr)].ravel()[:3].tolist()}"
        raise ModelInputError(msg)
    return arr


def _as_real(value: ArrayLike, name: str, unit: str, *, positive: bool = False) -> FloatArray:
    """A finite, non-negative (or positive) real array."""
    try:
        arr = np.asarray(value, dtype=np.float64)
    except (TypeError, ValueError):
        msg = f"{name}: expected a real number or array in {unit}, found {value!r}"
        raise ModelInputError(msg) from None
    bad = ~np.isfinite(arr) | ((arr <= 0.0) if positive else (arr < 0.0))
    if np.any(bad):
        expected = "> 0" if positive else ">= 0"
        msg = f"{name}: expected finite values {expected} {unit}, found {arr[bad].ravel()[:3].tolist()}"
        raise ModelInputError(msg)
    return arr


def _as_count(n: object, name: str) -> int:
    if isinstance(n, bool) or not isinstance(n, int | np.integer) or n < 0:
        msg = f"{name}: expected a whole number >= 0, found {n!r}"
        raise ModelInputError(msg)
    return int(n)


def _sinhc(x: ComplexArray) -> ComplexArray:
    """sinh(x)/x, an even function of x (so the branch of a square root giving x does not matter)."""
    small = np.abs(x) < _SERIES_CUTOFF
    safe = np.where(small, 1.0, x)
    x2 = x * x
    return np.where(small, 1.0 + x2 / 6.0 + x2 * x2 / 120.0, np.sinh(safe) / safe)


def _tanhc(x: ComplexArray) -> ComplexArray:
    """tanh(x)/x, even in x."""
    small = np.abs(x) < _SERIES_CUTOFF
    safe = np.where(small, 1.0, x)
    x2 = x * x
    return np.where(small, 1.0 - x2 / 3.0 + 2.0 * x2 * x2 / 15.0, np.tanh(safe) / safe)


def _matrix(a: ArrayLike, b: ArrayLike, c: ArrayLike, d: ArrayLike) -> ComplexArray:
    """Stack four broadcastable arrays into one ``(..., 2, 2)`` array."""
    a_, b_, c_, d_ = np.broadcast_arrays(*(np.asarray(v, dtype=np.complex128) for v in (a, b, c, d)))
    out = np.empty((*a_.shape, 2, 2), dtype=np.complex128)
    out[..., 0, 0], out[..., 0, 1], out[..., 1, 0], out[..., 1, 1] = a_, b_, c_, d_
    return out


# -- pure array functions ------------------------------------------------------------------------
def pi_to_abcd(z_series: ArrayLike, y_half_sending: ArrayLike, y_half_receiving: ArrayLike | None = None,
               ) -> ComplexArray:
    """ABCD array of a pi section: shunt ``Ys``, series ``Z``, shunt ``Yr``.

    Parameters
    ----------
    z_series : array_like of complex
        Series impedance, ohm.
    y_half_sending, y_half_receiving : array_like of complex
        Shunt admittance at the sending and receiving end, S (receiving defaults to sending).

    Returns
    -------
    ndarray of complex, shape ``(..., 2, 2)``
        ``A = 1 + Z*Yr``, ``B = Z``, ``C = Ys + Yr + Z*Ys*Yr``, ``D = 1 + Z*Ys``.
    """
    z = _as_complex(z_series, "z_series")
    ys = _as_complex(y_half_sending, "y_half_sending")
    yr = ys if y_half_receiving is None else _as_complex(y_half_receiving, "y_half_receiving")
    return _matrix(1.0 + z * yr, z, ys + yr + z * ys * yr, 1.0 + z * ys)


def abcd_to_y(abcd: ArrayLike, *, reciprocal: bool = False) -> ComplexArray:
    """Nodal admittance matrix (currents into both ports) of ABCD arrays.

    ``Y11 = D/B``, ``Y12 = -(AD - BC)/B``, ``Y21 = -1/B``, ``Y22 = A/B``. With
    ``reciprocal=True`` the two-port is taken as reciprocal (AD - BC = 1, true
    for any chain of passive R-L-C sections) and ``Y12 = Y21 = -1/B`` exactly:
    this avoids the rounding of ``AD - BC``, large in resonant lossless chains.

    Raises
    ------
    ModelInputError
        When ``B = 0`` somewhere (a two-port without series element has no Y matrix).
    """
    m = _as_complex(abcd, "abcd")
    a, b, c, d = m[..., 0, 0], m[..., 0, 1], m[..., 1, 0], m[..., 1, 1]
    if np.any(b == 0):
        msg = ("abcd: B = 0 (no series impedance), so the two-port has no admittance matrix; "
               "expected a two-port with a series element")
        raise ModelInputError(msg)
    y12 = -1.0 / b if reciprocal else -(a * d - b * c) / b
    return _matrix(d / b, y12, -1.0 / b, a / b)


def y_to_abcd(y: ArrayLike) -> ComplexArray:
    """ABCD arrays of nodal admittance matrices (the inverse of :func:`abcd_to_y`).

    ``A = -Y22/Y21``, ``B = -1/Y21``, ``C = -det(Y)/Y21``, ``D = -Y11/Y21``.

    Raises
    ------
    ModelInputError
        When ``Y21 = 0`` somewhere (the ports are not coupled, no ABCD exists).
    """
    m = _as_complex(y, "y")
    if m.ndim < 2 or m.shape[-2:] != (2, 2):
        msg = f"y: expected an array of shape (..., 2, 2), found shape {m.shape}"
        raise ModelInputError(msg)
    y11, y12, y21, y22 = m[..., 0, 0], m[..., 0, 1], m[..., 1, 0], m[..., 1, 1]
    if np.any(y21 == 0):
        msg = "y: Y21 = 0 (the two ports are not coupled), so no ABCD matrix exists"
        raise ModelInputError(msg)
    return _matrix(-y22 / y21, -1.0 / y21, -(y11 * y22 - y12 * y21) / y21, -y11 / y21)


def voltage_regulation(vs: ArrayLike, vr_full_load: ArrayLike, a: ArrayLike) -> FloatArray:
    """Voltage regulation ``(|Vs|/|A| - |Vr,FL|) / |Vr,FL|`` as a fraction (quantity ``regulation``, shown in %).

    ``|Vs|/|A|`` is the receiving-end voltage at no load with the sending-end voltage held.

    Parameters
    ----------
    vs : array_like of complex
        Sending-end voltage at full load, V.
    vr_full_load : array_like of complex
        Receiving-end voltage at full load, V (same basis as ``vs``).
    a : array_like of complex
        The A parameter of the line.
    """
    vr = np.abs(_as_complex(vr_full_load, "vr_full_load"))
    if np.any(vr == 0):
        msg = "vr_full_load: expected a non-zero full-load receiving-end voltage"
        raise ModelInputError(msg)
    return (np.abs(_as_complex(vs, "vs")) / np.abs(_as_complex(a, "a")) - vr) / vr


# -- the two-port value object ----------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class TwoPort:
    """A linear two-port given by its ABCD (chain) matrix, stacked: ``abcd`` has shape ``(..., 2, 2)``.

    Instances are immutable (the array is a read-only copy). Compare with
    :meth:`allclose`, not ``==``.

    >>> line = TwoPort.series(4.0 + 30j) @ TwoPort.shunt(1e-3j)
    >>> complex(line.a), complex(line.determinant())
    ((0.97+0.004j), (1+0j))
    """

    abcd: ComplexArray

    def __post_init__(self) -> None:
        arr = np.array(_as_complex(self.abcd, "abcd"), dtype=np.complex128)  # own copy
        if arr.ndim < 2 or arr.shape[-2:] != (2, 2):
            msg = f"abcd: expected an array of shape (..., 2, 2), found shape {arr.shape}"
            raise ModelInputError(msg)
        arr.setflags(write=False)
        object.__setattr__(self, "abcd", arr)

    # constructors ------------------------------------------------------------------------------
    @classmethod
    def identity(cls, shape: tuple[int, ...] = ()) -> TwoPort:
        """A through connection (``A = D = 1``, ``B = C = 0``), stacked to ``shape``."""
        return cls(np.broadcast_to(np.eye(2, dtype=np.complex128), (*shape, 2, 2)))

    @classmethod
    def series(cls, z: ArrayLike) -> TwoPort:
        """A series impedance ``z`` (ohm): ``[[1, z], [0, 1]]``."""
        z_ = _as_complex(z, "z")
        return cls(_matrix(1.0, z_, 0.0, 1.0))

    @classmethod
    def shunt(cls, y: ArrayLike) -> TwoPort:
        """A shunt admittance ``y`` (S): ``[[1, 0], [y, 1]]``."""
        y_ = _as_complex(y, "y")
        return cls(_matrix(1.0, 0.0, y_, 1.0))

    @classmethod
    def pi(cls, z_series: ArrayLike, y_half: ArrayLike, y_half_receiving: ArrayLike | None = None) -> TwoPort:
        """A pi section: series ``z_series`` (ohm) with ``y_half`` (S) at each end (or ``y_half_receiving`` there)."""
        return cls(pi_to_abcd(z_series, y_half, y_half_receiving))

    @classmethod
    def nominal_pi(cls, z_total: ArrayLike, y_total: ArrayLike) -> TwoPort:
        """Nominal pi of a line: total series ``Z`` (ohm), half the total shunt ``Y`` (S) at each end."""
        return cls.pi(z_total, _as_complex(y_total, "y_total") / 2.0)

    @classmethod
    def exact_line(cls, z_per_length: ArrayLike, y_per_length: ArrayLike, length: ArrayLike) -> TwoPort:
        """Exact (long-line) ABCD: ``A = D = cosh(γℓ)``, ``B = Zc sinh(γℓ)``, ``C = sinh(γℓ)/Zc``.

        Parameters
        ----------
        z_per_length : array_like of complex
            Series impedance per length, ohm/m (``r + jωl``).
        y_per_length : array_like of complex
            Shunt admittance per length, S/m (``g + jωc``); zero gives the short-line model.
        length : array_like of float
            Line length, m (same length unit as the per-length values).
        """
        ell = _as_real(length, "length", "m")
        z_total = _as_complex(z_per_length, "z_per_length") * ell
        y_total = _as_complex(y_per_length, "y_per_length") * ell
        return cls(_exact_abcd(z_total, y_total))

    @classmethod
    def from_y(cls, y: ArrayLike) -> TwoPort:
        """The two-port of a 2x2 nodal admittance matrix (currents into both ports), stacked."""
        return cls(y_to_abcd(y))

    # parameters --------------------------------------------------------------------------------
    @property
    def shape(self) -> tuple[int, ...]:
        """The stack shape (the shape of ``a``)."""
        return self.abcd.shape[:-2]

    @property
    def a(self) -> ComplexArray:
        """A, the open-circuit voltage ratio Vs/Vr (dimensionless)."""
        return self.abcd[..., 0, 0]

    @property
    def b(self) -> ComplexArray:
        """B, the short-circuit transfer impedance Vs/Ir, ohm."""
        return self.abcd[..., 0, 1]

    @property
    def c(self) -> ComplexArray:
        """C, the open-circuit transfer admittance Is/Vr, S."""
        return self.abcd[..., 1, 0]

    @property
    def d(self) -> ComplexArray:
        """D, the short-circuit current ratio Is/Ir (dimensionless)."""
        return self.abcd[..., 1, 1]

    def determinant(self) -> ComplexArray:
        """``AD - BC`` (1 for every passive reciprocal two-port)."""
        return self.a * self.d - self.b * self.c

    def to_y(self, *, reciprocal: bool = False) -> ComplexArray:
        """The 2x2 nodal admittance matrix for stamping, shape ``(..., 2, 2)``; see :func:`abcd_to_y`."""
        return abcd_to_y(self.abcd, reciprocal=reciprocal)

    def equivalent_pi(self) -> tuple[ComplexArray, ComplexArray, ComplexArray]:
        """The pi section with this ABCD: ``(Z_series, Y_half_sending, Y_half_receiving)`` in ohm, S, S.

        ``Z = B``, ``Ys = (D - 1)/B``, ``Yr = (A - 1)/B``.

        Raises
        ------
        ModelInputError
            When B = 0 or the two-port is not reciprocal (AD - BC differs from 1).
        """
        a, b, c, d = self.a, self.b, self.c, self.d
        if np.any(b == 0):
            msg = "equivalent_pi: B = 0 (no series impedance), so no pi section has this ABCD"
            raise ModelInputError(msg)
        scale = np.abs(a * d) + np.abs(b * c)
        if np.any(np.abs(a * d - b * c - 1.0) > _RECIPROCITY_RTOL * np.maximum(scale, 1.0)):
            msg = "equivalent_pi: AD - BC differs from 1, so the two-port is not reciprocal and has no pi equivalent"
            raise ModelInputError(msg)
        return b.copy(), (d - 1.0) / b, (a - 1.0) / b

    # combination -------------------------------------------------------------------------------
    def cascade(self, *others: TwoPort) -> TwoPort:
        """This two-port followed by ``others`` in series (chain matrix product), broadcasting stacks."""
        out = self.abcd
        for other in others:
            out = np.matmul(out, _two_port(other).abcd)
        return TwoPort(out)

    def __matmul__(self, other: TwoPort) -> TwoPort:
        return self.cascade(other)

    def power(self, n: int) -> TwoPort:
        """``n`` identical copies in cascade (``n = 0`` gives the identity), by repeated squaring on the stack."""
        count = _as_count(n, "n")
        result = np.broadcast_to(np.eye(2, dtype=np.complex128), self.abcd.shape)
        base = self.abcd
        while count:
            if count & 1:
                result = np.matmul(result, base)  # powers of one matrix commute
            count >>= 1
            if count:
                base = np.matmul(base, base)
        return TwoPort(result)

    def parallel(self, *others: TwoPort) -> TwoPort:
        """This two-port in parallel with ``others`` (sum of admittance matrices); see :func:`parallel`."""
        return parallel(self, *others)

    def reversed(self) -> TwoPort:
        """The same two-port seen from the other end (ports swapped): ``[[D, B], [C, A]] / (AD - BC)``."""
        det = self.determinant()
        return TwoPort(_matrix(self.d / det, self.b / det, self.c / det, self.a / det))

    # port quantities ---------------------------------------------------------------------------
    def send(self, vr: ArrayLike, ir: ArrayLike) -> tuple[ComplexArray, ComplexArray]:
        """Sending-end ``(Vs, Is)`` from receiving-end ``Vr`` (V) and ``Ir`` (A, flowing out to the load)."""
        vr_, ir_ = _as_complex(vr, "vr"), _as_complex(ir, "ir")
        return self.a * vr_ + self.b * ir_, self.c * vr_ + self.d * ir_

    def receive(self, vs: ArrayLike, is_: ArrayLike) -> tuple[ComplexArray, ComplexArray]:
        """Receiving-end ``(Vr, Ir)`` from sending-end ``Vs`` (V) and ``Is`` (A): the inverse of :meth:`send`."""
        vs_, is__ = _as_complex(vs, "vs"), _as_complex(is_, "is_")
        det = self.determinant()
        return (self.d * vs_ - self.b * is__) / det, (self.a * is__ - self.c * vs_) / det

    def regulation(self, vs: ArrayLike, vr_full_load: ArrayLike) -> FloatArray:
        """Voltage regulation as a fraction; see :func:`voltage_regulation`."""
        return voltage_regulation(vs, vr_full_load, self.a)

    def allclose(self, other: TwoPort, rtol: float = 1e-9, atol: float = 0.0) -> bool:
        """True when the ABCD arrays agree elementwise within ``rtol``/``atol`` (``numpy.allclose``)."""
        return bool(np.allclose(self.abcd, _two_port(other).abcd, rtol=rtol, atol=atol))

    def __repr__(self) -> str:
        if self.shape == ():
            a, b, c, d = (complex(v) for v in (self.a, self.b, self.c, self.d))
            return f"TwoPort(A={a:.6g}, B={b:.6g} ohm, C={c:.6g} S, D={d:.6g})"
        return f"TwoPort(shape={self.shape})"


def _two_port(value: object) -> TwoPort:
    if not isinstance(value, TwoPort):
        msg = f"expected a TwoPort, found {type(value).__name__}"
        raise ModelInputError(msg)
    return value


def parallel(*ports: TwoPort) -> TwoPort:
    """Two-ports connected in parallel between the same two port pairs: their admittance matrices add.

    Raises
    ------
    ModelInputError
        When no two-port is given, or one has no admittance matrix (B = 0).
    """
    if not ports:
        msg = "parallel: expected at least one two-port"
        raise ModelInputError(msg)
    total = sum((_two_port(p).to_y() for p in ports[1:]), start=_two_port(ports[0]).to_y())
    return TwoPort.from_y(total)


def _exact_abcd(z_total: ComplexArray, y_total: ComplexArray) -> ComplexArray:
    """Long-line ABCD from total ``Z = zℓ`` and ``Y = yℓ``, with ``γℓ = sqrt(ZY)`` (safe for Y = 0)."""
    theta = np.sqrt(z_total * y_total)
    sinhc = _sinhc(theta)
    cosh = np.cosh(theta)
    # B = Zc sinh(γℓ) = Z sinh(γℓ)/(γℓ) and C = sinh(γℓ)/Zc = Y sinh(γℓ)/(γℓ).
    return _matrix(cosh, z_total * sinhc, y_total * sinhc, cosh)


# -- full-scale line helpers ------------------------------------------------------------------------
def propagation_constant(z_per_length: ArrayLike, y_per_length: ArrayLike) -> ComplexArray:
    """Propagation constant ``γ = sqrt(z y) = α + jβ`` per length (1/m for per-metre inputs), with α, β >= 0."""
    gamma = np.sqrt(_as_complex(z_per_length, "z_per_length") * _as_complex(y_per_length, "y_per_length"))
    # Pick the root travelling forward (α >= 0, β >= 0) whatever the sign of a zero imaginary part.
    flip = (gamma.real < 0) | ((gamma.real == 0) & (gamma.imag < 0))
    return np.where(flip, -gamma, gamma)


def characteristic_impedance(z_per_length: ArrayLike, y_per_length: ArrayLike) -> ComplexArray:
    """Characteristic impedance ``Zc = sqrt(z/y)``, ohm, with a positive real part.

    Raises
    ------
    ModelInputError
        When ``y = 0`` (a line without shunt admittance has no finite Zc).
    """
    z = _as_complex(z_per_length, "z_per_length")
    y = _as_complex(y_per_length, "y_per_length")
    if np.any(y == 0):
        msg = "y_per_length: expected a non-zero shunt admittance (Zc = sqrt(z/y))"
        raise ModelInputError(msg)
    zc = np.sqrt(z / y)
    return np.where(zc.real < 0, -zc, zc)


def surge_impedance(l_per_length: ArrayLike, c_per_length: ArrayLike) -> FloatArray:
    """Surge impedance of the lossless line, ``sqrt(l/c)``, ohm (l in H/m, c in F/m)."""
    return np.sqrt(_as_real(l_per_length, "l_per_length", "H/m", positive=True)
                   / _as_real(c_per_length, "c_per_length", "F/m", positive=True))


def surge_impedance_loading(voltage: ArrayLike, surge_impedance_ohm: ArrayLike) -> FloatArray:
    """Surge impedance loading ``V**2 / Zc``, W.

    With the line-to-line voltage this is the three-phase SIL; with the
    line-to-neutral voltage, the per-phase SIL.
    """
    v = _as_real(voltage, "voltage", "V")
    return v * v / _as_real(surge_impedance_ohm, "surge_impedance_ohm", "ohm", positive=True)


def line_equivalent_pi(z_per_length: ArrayLike, y_per_length: ArrayLike, length: ArrayLike,
                       ) -> tuple[ComplexArray, ComplexArray]:
    """Equivalent pi of a line: ``(Z', Y'/2)`` with ``Z' = Zc sinh(γℓ)``, ``Y'/2 = tanh(γℓ/2)/Zc``.

    Computed as ``Z' = Z sinh(γℓ)/γℓ`` and ``Y'/2 = (Y/2) tanh(γℓ/2)/(γℓ/2)`` (Z = zℓ, Y = yℓ),
    which stays finite for ``y = 0``. Units: ohm/m, S/m, m in; ohm, S out.
    """
    ell = _as_real(length, "length", "m")
    return _equivalent_pi_totals(_as_complex(z_per_length, "z_per_length") * ell,
                                 _as_complex(y_per_length, "y_per_length") * ell)


def line_nominal_pi(z_per_length: ArrayLike, y_per_length: ArrayLike, length: ArrayLike,
                    ) -> tuple[ComplexArray, ComplexArray]:
    """Nominal pi of a line: ``(Z, Y/2) = (zℓ, yℓ/2)``, ohm and S."""
    ell = _as_real(length, "length", "m")
    return _as_complex(z_per_length, "z_per_length") * ell, _as_complex(y_per_length, "y_per_length") * ell / 2.0


def _equivalent_pi_totals(z_total: ComplexArray, y_total: ComplexArray) -> tuple[ComplexArray, ComplexArray]:
    theta = np.sqrt(z_total * y_total)
    return z_total * _sinhc(theta), (y_total / 2.0) * _tanhc(theta / 2.0)


# -- per-unit scaling -----------------------------------------------------------------------------
@dataclass(frozen=True)
class ScalingBases:
    """Per-unit bases of the full-scale line and of the bench (V, VA, Hz; consistently per phase or three-phase)."""

    full_scale_voltage: float
    full_scale_power: float
    full_scale_frequency: float
    bench_voltage: float
    bench_power: float
    bench_frequency: float

    def __post_init__(self) -> None:
        units = {"voltage": "V", "power": "VA", "frequency": "Hz"}
        for side in ("full_scale", "bench"):
            for what, unit in units.items():
                name = f"{side}_{what}"
                object.__setattr__(self, name, float(_as_real(getattr(self, name), name, unit, positive=True)))

    @classmethod
    def from_line_scaling(cls, scaling: LineScaling, bench_frequency: float) -> ScalingBases:
        """The bases of a bench's ``[line_scaling]`` table, with the bench's frequency (Hz)."""
        return cls(scaling.full_scale_voltage, scaling.full_scale_power, scaling.full_scale_frequency,
                   scaling.bench_voltage, scaling.bench_power, bench_frequency)

    @property
    def full_scale_impedance_base(self) -> float:
        """``V**2 / S`` of the full-scale line, ohm."""
        return self.full_scale_voltage**2 / self.full_scale_power

    @property
    def bench_impedance_base(self) -> float:
        """``V**2 / S`` of the bench, ohm."""
        return self.bench_voltage**2 / self.bench_power

    @property
    def impedance_ratio(self) -> float:
        """Bench ohms per full-scale ohm, ``Zbase_bench / Zbase_full_scale``."""
        return self.bench_impedance_base / self.full_scale_impedance_base

    @property
    def frequency_ratio(self) -> float:
        """``f_bench / f_full_scale``."""
        return self.bench_frequency / self.full_scale_frequency


@dataclass(frozen=True, eq=False)
class BenchLumped:
    """Bench lumped values standing for a full-scale series impedance and shunt admittance (:func:`scale_to_bench`).

    ``c`` and ``g`` are the *total* shunt values (half at each end of a pi section).
    """

    r: FloatArray
    """Series resistance, ohm."""
    l: FloatArray  # noqa: E741 - the trade's own letter
    """Series inductance, H."""
    c: FloatArray
    """Total shunt capacitance, F."""
    g: FloatArray
    """Total shunt conductance, S."""
    z_pu_full_scale: ComplexArray
    """Series impedance of the full-scale line in per unit, at the full-scale frequency."""
    y_pu_full_scale: ComplexArray
    """Shunt admittance of the full-scale line in per unit, at the full-scale frequency."""
    z_pu_bench: ComplexArray
    """Series impedance of the bench values in per unit, at the bench frequency."""
    y_pu_bench: ComplexArray
    """Shunt admittance of the bench values in per unit, at the bench frequency."""
    frequency_ratio: float
    """``f_bench / f_full_scale``."""
    differences: tuple[str, ...]
    """Where the bench at its own frequency does not reproduce the full-scale per-unit values; empty if it does."""


def _x_over_r(z: ComplexArray) -> FloatArray:
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.where(z.real > 0, z.imag / np.where(z.real > 0, z.real, 1.0), np.inf)


def scale_to_bench(z_series: ArrayLike, y_shunt: ArrayLike, bases: ScalingBases) -> BenchLumped:
    """Map a full-scale series impedance and shunt admittance to bench R, L, C, G.

    Parameters
    ----------
    z_series : array_like of complex
        Full-scale series impedance ``R + jX`` at the full-scale frequency, ohm.
    y_shunt : array_like of complex
        Full-scale total shunt admittance ``G + jB`` at the full-scale frequency, S.
    bases : ScalingBases
        Both sides' bases.

    Returns
    -------
    BenchLumped
        ``R = R_fs k``, ``L = X_fs k / ω_fs``, ``C = B_fs / (k ω_fs)``, ``G = G_fs / k`` with
        ``k = Zbase_bench / Zbase_full_scale``; ``differences`` lists what changes when the bench
        runs at a frequency other than the full-scale one.

    Raises
    ------
    ModelInputError
        When a resistance, reactance, conductance or susceptance is negative (not buildable from R, L, C).
    """
    z = _as_complex(z_series, "z_series")
    y = _as_complex(y_shunt, "y_shunt")
    for part, name, what in ((z.real, "z_series", "resistance"), (z.imag, "z_series", "reactance"),
                             (y.real, "y_shunt", "conductance"), (y.imag, "y_shunt", "susceptance")):
        if np.any(part < 0):
            msg = f"{name}: expected a non-negative {what} (a bench builds it from R, L and C), found {part.min()}"
            raise ModelInputError(msg)
    k = bases.impedance_ratio
    omega_fs = 2.0 * np.pi * bases.full_scale_frequency
    r, l_h = z.real * k, z.imag * k / omega_fs
    g, c_f = y.real / k, y.imag / (k * omega_fs)
    ratio = bases.frequency_ratio
    z_pu_fs = z / bases.full_scale_impedance_base
    y_pu_fs = y * bases.full_scale_impedance_base
    z_pu_bench = (z.real + 1j * z.imag * ratio) / bases.full_scale_impedance_base
    y_pu_bench = (y.real + 1j * y.imag * ratio) * bases.full_scale_impedance_base
    differences: list[str] = []
    if abs(ratio - 1.0) > 1e-12:
        differences.append(
            f"bench frequency {bases.bench_frequency:g} Hz differs from the full-scale"
            f" {bases.full_scale_frequency:g} Hz:"
            f" per-unit reactances and susceptances on the bench are {ratio:.6g} times the full-scale ones"
            f" (electrical length scales by {ratio:.6g}; the per-unit surge impedance is kept)")
        xr_fs, xr_bench = _x_over_r(z), _x_over_r(z_pu_bench)
        if np.any(np.isfinite(xr_fs)):
            first = " for the first value" if xr_fs.size > 1 else ""
            differences.append(f"series X/R changes from {np.ravel(xr_fs)[0]:.6g} (full scale) to "
                               f"{np.ravel(xr_bench)[0]:.6g} (bench){first}")
    return BenchLumped(r=r, l=l_h, c=c_f, g=g, z_pu_full_scale=z_pu_fs, y_pu_full_scale=y_pu_fs,
                       z_pu_bench=z_pu_bench, y_pu_bench=y_pu_bench, frequency_ratio=ratio,
                       differences=tuple(differences))


@dataclass(frozen=True, eq=False)
class FullScaleEquivalent:
    """The full-scale line a bench section stands for (:func:`scale_to_full_scale`)."""

    z_series: ComplexArray
    """Full-scale series impedance at the full-scale frequency, ohm."""
    y_shunt: ComplexArray
    """Full-scale total shunt admittance at the full-scale frequency, S."""
    z_pu: ComplexArray
    """Series impedance in per unit (same on both sides at the full-scale frequency)."""
    y_pu: ComplexArray
    """Shunt admittance in per unit."""
    length_from_r: FloatArray | None
    """Length whose per-length resistance gives the series resistance, m (None if r_per_length not given or 0)."""
    length_from_l: FloatArray | None
    """Length whose per-length inductance gives the series inductance, m."""
    length_from_c: FloatArray | None
    """Length whose per-length capacitance gives the shunt capacitance, m."""

    @property
    def length(self) -> FloatArray | None:
        """The length implied by the series inductance (the dominant parameter of an overhead line), m."""
        return self.length_from_l


def scale_to_full_scale(r: ArrayLike, l: ArrayLike, c: ArrayLike, bases: ScalingBases,  # noqa: E741
                        *, g: ArrayLike = 0.0, r_per_length: float | None = None,
                        l_per_length: float | None = None, c_per_length: float | None = None,
                        ) -> FullScaleEquivalent:
    """What full-scale line a bench section (R ohm, L H, total C F, total G S) stands for.

    The inverse of :func:`scale_to_bench`. Given per-length parameters of a
    full-scale line (ohm/m, H/m, F/m), also the length each of them implies;
    they agree when the section was scaled from that line.
    """
    k = bases.impedance_ratio
    omega_fs = 2.0 * np.pi * bases.full_scale_frequency
    r_fs = _as_real(r, "r", "ohm") / k
    l_fs = _as_real(l, "l", "H") / k
    c_fs = _as_real(c, "c", "F") * k
    g_fs = _as_real(g, "g", "S") * k
    z = r_fs + 1j * omega_fs * l_fs
    y = g_fs + 1j * omega_fs * c_fs

    def length(total: FloatArray, per_length: float | None, name: str, unit: str) -> FloatArray | None:
        if per_length is None:
            return None
        per = float(_as_real(per_length, name, unit))
        return None if per == 0.0 else total / per

    return FullScaleEquivalent(
        z_series=z, y_shunt=y, z_pu=z / bases.full_scale_impedance_base, y_pu=y * bases.full_scale_impedance_base,
        length_from_r=length(r_fs, r_per_length, "r_per_length", "ohm/m"),
        length_from_l=length(l_fs, l_per_length, "l_per_length", "H/m"),
        length_from_c=length(c_fs, c_per_length, "c_per_length", "F/m"))


# -- bench sections -------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class SectionValues:
    """Bench values of one pi section, independent of frequency; arrays of a common sample shape allowed.

    ``nominal_pi``: series ``R + jωL`` with ``(G + jωC)/2`` at each end.
    ``exact_pi``: the equivalent pi of a distributed line with those totals
    (``Z = R + jωL``, ``Y = G + jωC``), which depends on frequency in a way a
    lumped pi does not; this is how sections standing for a full-scale line
    with ``model = "exact_pi"`` are predicted, at every harmonic.
    """

    r: FloatArray
    """Series resistance of the whole section, ohm."""
    l: FloatArray  # noqa: E741 - the trade's own letter
    """Series inductance, H."""
    c: FloatArray
    """Total shunt capacitance (C/2 at each end), F."""
    g: FloatArray = 0.0  # type: ignore[assignment]  # converted to an array in __post_init__
    """Total shunt conductance, S."""
    model: PiModel = "nominal_pi"
    section_id: str = ""

    def __post_init__(self) -> None:
        where = f"section {self.section_id}: " if self.section_id else ""
        if self.model not in ("nominal_pi", "exact_pi"):
            msg = f'{where}model: expected "nominal_pi" or "exact_pi", found {self.model!r}'
            raise ModelInputError(msg)
        values = [_as_real(getattr(self, name), f"{where}{name}", unit)
                  for name, unit in (("r", "ohm"), ("l", "H"), ("c", "F"), ("g", "S"))]
        try:
            shape = np.broadcast_shapes(*(v.shape for v in values))
        except ValueError:
            msg = f"{where}r, l, c, g: expected arrays of one sample shape, found {[v.shape for v in values]}"
            raise ModelInputError(msg) from None
        for name, value in zip(("r", "l", "c", "g"), values, strict=True):
            arr = np.array(np.broadcast_to(value, shape))
            arr.setflags(write=False)
            object.__setattr__(self, name, arr)

    @property
    def shape(self) -> tuple[int, ...]:
        """The sample shape of the values."""
        return self.r.shape

    def with_values(self, **changes: ArrayLike) -> SectionValues:
        """A copy with some of ``r``, ``l``, ``c``, ``g`` replaced (e.g. by Monte Carlo sample arrays)."""
        unknown = set(changes) - {"r", "l", "c", "g"}
        if unknown:
            msg = f"with_values: expected some of r, l, c, g, found {sorted(unknown)}"
            raise ModelInputError(msg)
        return replace(self, **changes)

    def pi(self, omega: ArrayLike) -> tuple[ComplexArray, ComplexArray]:
        """``(Z_series, Y_half)`` at angular frequencies ``omega`` (rad/s); shapes ``self.shape + omega.shape``."""
        w = _as_real(omega, "omega", "rad/s")
        expand = (...,) + (None,) * w.ndim
        z = self.r[expand] + 1j * w * self.l[expand]
        y = self.g[expand] + 1j * w * self.c[expand]
        if self.model == "nominal_pi":
            return z, y / 2.0
        return _equivalent_pi_totals(z, y)

    def two_port(self, omega: ArrayLike) -> TwoPort:
        """The section's ABCD at ``omega`` (rad/s), shape ``self.shape + omega.shape + (2, 2)``."""
        return TwoPort.pi(*self.pi(omega))

    def admittance(self, omega: ArrayLike) -> ComplexArray:
        """The section's 2x2 nodal admittance matrix at ``omega`` (rad/s), for stamping between its two nodes."""
        z, y_half = self.pi(omega)
        if np.any(z == 0):
            msg = f"section {self.section_id or '(unnamed)'}: zero series impedance, no admittance matrix exists"
            raise ModelInputError(msg)
        y_series = 1.0 / z
        return _matrix(y_series + y_half, -y_series, -y_series, y_series + y_half)

    def equivalent_lumped(self, omega0: float) -> SectionValues:
        """Lumped nominal-pi values matching this section exactly at ``omega0`` (rad/s): what to build for it."""
        w0 = float(_as_real(omega0, "omega0", "rad/s", positive=True))
        z, y_half = self.pi(w0)
        return SectionValues(r=z.real, l=z.imag / w0, c=2.0 * y_half.imag / w0, g=2.0 * y_half.real,
                             model="nominal_pi", section_id=self.section_id)


def _impedance_ratio(scaling: LineScaling) -> float:
    """``Zbase_bench / Zbase_full_scale`` (no frequency needed for R, L, C, G)."""
    return (scaling.bench_voltage**2 / scaling.bench_power) / (scaling.full_scale_voltage**2
                                                                / scaling.full_scale_power)


def section_values(section: LineSection, scaling: LineScaling | None = None) -> SectionValues:
    """The bench values of a ``[[line_sections]]`` entry: its own r, l, c, or its ``full_scale`` line scaled.

    A full-scale line of length ℓ and per-length r, l, c, g becomes
    ``R = rℓk``, ``L = lℓk``, ``C = cℓ/k``, ``G = gℓ/k`` with ``k = Zbase_bench/Zbase_full_scale``
    (the same as :func:`scale_to_bench` at the full-scale frequency), in the model the table names.

    Raises
    ------
    ModelInputError
        When the section gives a full-scale line but the bench has no ``[line_scaling]``.
    """
    if section.full_scale is None:
        return SectionValues(r=section.r, l=section.l, c=section.c, model="nominal_pi", section_id=section.id)
    if scaling is None:
        msg = f"section {section.id}: gives a full_scale line, so the bench needs a [line_scaling] table"
        raise ModelInputError(msg)
    fs, k = section.full_scale, _impedance_ratio(scaling)
    return SectionValues(r=fs.r_per_length * fs.length * k, l=fs.l_per_length * fs.length * k,
                         c=fs.c_per_length * fs.length / k, g=fs.g_per_length * fs.length / k,
                         model=fs.model, section_id=section.id)


def section_pi(section: LineSection, scaling: LineScaling | None, omega: ArrayLike,
               ) -> tuple[ComplexArray, ComplexArray]:
    """``(Z_series, Y_half)`` of a bench section at angular frequencies ``omega`` (rad/s), ohm and S."""
    return section_values(section, scaling).pi(omega)


def bench_section_values(bench: Bench) -> dict[str, SectionValues]:
    """:func:`section_values` of every line section of a bench, by section id."""
    return {s.id: section_values(s, bench.line_scaling) for s in bench.line_sections}


# -- branches: parallel paths of series sections -------------------------------------------------------
def path_two_port(path: Sequence[SectionValues], omega: ArrayLike) -> TwoPort:
    """Cascade of the sections of one path at ``omega`` (rad/s); shape ``P + omega.shape + (2, 2)``."""
    if not path:
        msg = "path: expected at least one section"
        raise ModelInputError(msg)
    first, *rest = (s.two_port(omega) for s in path)
    return first.cascade(*rest)


def branch_two_port(paths: Sequence[Sequence[SectionValues]], omega: ArrayLike) -> TwoPort:
    """Two-port of parallel paths, each a series chain of sections, at ``omega`` (rad/s).

    Raises
    ------
    ModelInputError
        When there is no path (an open branch has no two-port; :func:`branch_admittance` gives zeros).
    """
    if not paths:
        msg = "paths: an open branch (no path) has no two-port; use branch_admittance, which gives zeros"
        raise ModelInputError(msg)
    return parallel(*(path_two_port(p, omega) for p in paths))


def branch_admittance(paths: Sequence[Sequence[SectionValues]], omega: ArrayLike) -> ComplexArray:
    """Reduced 2x2 nodal admittance matrix of a branch (internal nodes eliminated), shape ``P + W + (2, 2)``.

    Row/column 0 is the branch's ``from_bus``, 1 its ``to_bus``; an open branch (no paths) gives zeros.
    """
    if not paths:
        return np.zeros((*np.shape(_as_real(omega, "omega", "rad/s")), 2, 2), dtype=np.complex128)
    y_paths = [path[0].admittance(omega) if len(path) == 1 else path_two_port(path, omega).to_y(reciprocal=True)
               for path in paths]
    return sum(y_paths[1:], start=y_paths[0])


def position_paths(branch: LineBranch, position: str, values: Mapping[str, SectionValues],
                   ) -> list[list[SectionValues]]:
    """The paths of a branch position as section values; ``"open"`` (unless defined) gives no paths.

    Raises
    ------
    UnknownNameError
        For an unknown position or section id (with a did-you-mean hint).
    ModelInputError
        When one section appears twice in a position (one piece of hardware cannot be in two places).
    """
    chosen = next((p for p in branch.positions if p.name == position), None)
    if chosen is None:
        if position == OPEN_POSITION:
            return []
        names = [p.name for p in branch.positions] + [OPEN_POSITION]
        msg = f'line branch {branch.id}: no position "{position}"{did_you_mean(position, names)}'
        raise UnknownNameError(msg)
    used = [sid for path in chosen.paths for sid in path]
    twice = sorted({sid for sid in used if used.count(sid) > 1})
    if twice:
        msg = f"line branch {branch.id}, position {position}: section(s) {', '.join(twice)} used more than once"
        raise ModelInputError(msg)
    out = []
    for path in chosen.paths:
        row = []
        for sid in path:
            if sid not in values:
                hint = did_you_mean(sid, values)
                msg = f'line branch {branch.id}, position {position}: no line section "{sid}"{hint}'
                raise UnknownNameError(msg)
            row.append(values[sid])
        out.append(row)
    return out


@dataclass(frozen=True)
class SectionStamp:
    """One section of a branch between two nodes, for a network builder that keeps internal nodes."""

    section_id: str
    path_index: int
    """Index of the path in the position (0-based)."""
    index_in_path: int
    """Index of the section along its path from ``from_bus`` (0-based)."""
    node_from: str
    """Bus name or internal node name at the section's from end."""
    node_to: str
    """Bus name or internal node name at the section's to end."""
    values: SectionValues

    def pi(self, omega: ArrayLike) -> tuple[ComplexArray, ComplexArray]:
        """``(Z_series, Y_half)`` at ``omega`` (rad/s): stamp Z between the nodes and Y_half at each to ground."""
        return self.values.pi(omega)

    def admittance(self, omega: ArrayLike) -> ComplexArray:
        """2x2 nodal admittance matrix over ``(node_from, node_to)`` at ``omega`` (rad/s)."""
        return self.values.admittance(omega)


@dataclass(frozen=True)
class BranchLayout:
    """Internal nodes and per-section elements of a branch position."""

    internal_nodes: tuple[str, ...]
    """Names of the nodes between sections; they contain ``/``, which no bus name can."""
    sections: tuple[SectionStamp, ...]


def internal_node_name(branch_id: str, path_index: int, node_index: int) -> str:
    """Name of the ``node_index``-th node (1-based) after ``from_bus`` along path ``path_index`` of a branch."""
    return f"{branch_id}/p{path_index}/n{node_index}"


def branch_layout(branch_id: str, from_bus: str, to_bus: str, paths: Sequence[Sequence[SectionValues]],
                  ) -> BranchLayout:
    """List the internal nodes and per-section stamps of parallel paths between ``from_bus`` and ``to_bus``.

    A path of N sections has N - 1 internal nodes, named by :func:`internal_node_name`.
    """
    nodes: list[str] = []
    stamps: list[SectionStamp] = []
    for p, path in enumerate(paths):
        if not path:
            msg = f"line branch {branch_id}: path {p} has no section"
            raise ModelInputError(msg)
        chain = [from_bus, *(internal_node_name(branch_id, p, j) for j in range(1, len(path))), to_bus]
        nodes.extend(chain[1:-1])
        stamps.extend(SectionStamp(values.section_id, p, j, chain[j], chain[j + 1], values)
                      for j, values in enumerate(path))
    return BranchLayout(tuple(nodes), tuple(stamps))


def position_layout(branch: LineBranch, position: str, values: Mapping[str, SectionValues]) -> BranchLayout:
    """:func:`branch_layout` of a bench branch in one of its positions (``"open"``: no nodes, no sections)."""
    return branch_layout(branch.id, branch.from_bus, branch.to_bus, position_paths(branch, position, values))


def branch_full_scale_note(bench: Bench, branch_id: str, position: str) -> str:
    """What full-scale line a branch in a position stands for, and where X/R or frequency differ.

    Uses the branch's equivalent pi at the bench frequency, scaled by the bench's
    ``[line_scaling]`` bases; the length is given when its sections carry
    per-length data of a full-scale line. Empty when the bench has no scaling.
    """
    scaling = bench.line_scaling
    if scaling is None or position == "open":
        return ""
    branch = next(b for b in bench.line_branches if b.id == branch_id)
    values = bench_section_values(bench)
    f_bench = bench.bench.nominal_frequency
    omega = 2 * np.pi * f_bench
    z, ys, yr = branch_two_port(position_paths(branch, position, values), omega).equivalent_pi()
    z, y_total = complex(np.asarray(z)), complex(np.asarray(ys) + np.asarray(yr))
    bases = ScalingBases.from_line_scaling(scaling, f_bench)
    eq = scale_to_full_scale(z.real, z.imag / omega, y_total.imag / omega, bases, g=max(y_total.real, 0.0))
    text = (f"{branch_id} ({position}) stands for a full-scale line of Z = {complex(eq.z_pu):.4g} pu, "
            f"Y = {complex(eq.y_pu):.4g} pu")
    pos = next(p for p in branch.positions if p.name == position)
    sections = [[bench.section(sid) for sid in path] for path in pos.paths]
    if all(sec.full_scale is not None for path in sections for sec in path):
        lengths = {round(sum(sec.full_scale.length for sec in path), 6) for path in sections}  # type: ignore[union-attr]
        circuits = f"{len(sections)} parallel circuits of " if len(sections) > 1 else ""
        text += ", " + circuits + " / ".join(f"{km / 1000:.4g} km" for km in sorted(lengths))
    xr_bench = z.imag / z.real if z.real else float("inf")
    text += f"; X/R {xr_bench:.3g} on the bench"
    if abs(bases.frequency_ratio - 1.0) > 1e-9:
        text += (f"; the bench runs at {f_bench:g} Hz against {scaling.full_scale_frequency:g} Hz full scale, so its "
                 "reactances differ from the full-scale per-unit values by that ratio")
    return text
