"""RC snubber design from measured ringing: parasitics, damping resistor, capacitor and its loss.

The switch node rings as a parallel tank: the leakage inductance L against the node capacitance
Cpar (Coss, winding and stray capacitance), with the far end of L held by the stiff reflected
voltage. The published design forms (Severns, "Design of Snubbers for Power Circuits", RC snubber
section) are

* f = 1 / (2π√(L·Cpar)), so Cpar = 1 / ((2πf)²·L) when L is known;
* added-capacitance method: a known Cadd across the node moves the ring from f1 to f2, so
  Cpar = Cadd / ((f1/f2)² − 1) and L = 1 / ((2π·f1)²·Cpar);
* the damping resistor equals the characteristic impedance R = √(L/Cpar) = 2π·f·L, which gives a
  Q of about 1;
* the resistor dissipates Cs·V²·fsw, so a loss budget P at V and fsw allows Cs = P / (V²·fsw).

With an Rs–Cs damper already fitted, one measured ring (its pole λ = −ζωn + jωd) fixes both L and
Cpar: the node admittance 1/(sL) + s·Cpar + s·Cs/(1 + s·Rs·Cs) vanishes at λ, i.e.

    L·Cpar·Rs·Cs·λ³ + L·(Cpar + Cs)·λ² + Rs·Cs·λ + 1 = 0,

which is linear in the unknowns X = L·Cpar and L; its real and imaginary parts are two real
equations (:func:`loaded_ring_network`). No impedance analyser and no second measurement.

The proposal treats a loss budget as a cap: Cs is the conventional 3 × Cpar unless that would burn
more than the budget, and then the largest Cs within it. Rs is then chosen for that Cs: the
resistance that damps the ring most (the largest ζ of the dominant pole pair), which is near
√(L/Cpar) only when Cs is several times Cpar (:func:`best_damping_resistance_ohm`).

When the RC damper's resistor would burn more than an RCD clamp, the clamp is sized instead by the
RCD clamp energy balance (as in Fairchild Semiconductor application note AN-4147, "Design
Guidelines for RCD Snubber of Flyback Converters"; the formulas below are recalled from memory of
that note, not copied from it): with
the clamp capacitor's voltage Vclamp above the bus, reflected voltage Vr, leakage inductance Llk,
peak primary current Ipk and switching frequency fsw,

* P = ½·Llk·Ipk²·fsw·Vclamp/(Vclamp − Vr): the leakage energy, enlarged because the reflected
  voltage keeps driving current into the clamp while the leakage current falls;
* R = Vclamp²/P, the resistor that dissipates P at Vclamp;
* C = Vclamp/(ΔV·R·fsw) for a ripple ΔV on the clamp capacitor.

Messages of :class:`DesignInputError` name the offending inputs by their keyword names so that a
caller can map them to its own option names.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import asdict, dataclass, field

import numpy as np

from labseq.analysis.snubber import cv2f_loss_w

#: Conventional Cs/Cpar ratio range for an RC snubber (common practice, no published source).
CONVENTIONAL_CS_RATIO = (3.0, 4.0)


class DesignInputError(ValueError):
    """Design inputs that are missing, inconsistent or out of range."""


def parasitic_capacitance_f(ring_frequency_hz: float, leakage_h: float) -> float:
    """Node capacitance Cpar = 1 / ((2πf)²·L) from the ring frequency and the leakage inductance."""
    return 1.0 / ((2 * math.pi * ring_frequency_hz) ** 2 * leakage_h)


def added_capacitance_method(
    ring_freq_hz: float, ring_freq_added_hz: float, added_cap_f: float
) -> tuple[float, float]:
    """(Cpar, L) from the ring frequency without (f1) and with (f2) a known added capacitance.

    Cpar = Cadd / ((f1/f2)² − 1) and L = 1 / ((2π·f1)²·Cpar), from f ∝ 1/√C at fixed L.
    """
    if not ring_freq_added_hz < ring_freq_hz:
        raise DesignInputError(
            f"ring_freq_added_hz ({ring_freq_added_hz:g} Hz) must be below ring_freq_hz "
            f"({ring_freq_hz:g} Hz): added capacitance lowers the ring frequency"
        )
    c_par_f = added_cap_f / ((ring_freq_hz / ring_freq_added_hz) ** 2 - 1.0)
    return c_par_f, 1.0 / ((2 * math.pi * ring_freq_hz) ** 2 * c_par_f)


def characteristic_impedance_ohm(leakage_h: float, c_par_f: float) -> float:
    """R = √(L/Cpar), the damping resistor for Q ≈ 1 (equal to 2π·f·L at the ring frequency)."""
    return math.sqrt(leakage_h / c_par_f)


def capacitance_for_loss_f(loss_w: float, volts: float, fsw_hz: float) -> float:
    """Snubber capacitance Cs = P / (V²·fsw) whose resistor loss is ``loss_w``."""
    return loss_w / (volts**2 * fsw_hz)


def _characteristic(leakage_h: float, c_par_f: float, r_ohm: float, cs_f: float) -> list[float]:
    """Coefficients of L·Cpar·R·Cs·s³ + L·(Cpar + Cs)·s² + R·Cs·s + 1, highest power first."""
    return [leakage_h * c_par_f * r_ohm * cs_f, leakage_h * (c_par_f + cs_f), r_ohm * cs_f, 1.0]


def snubber_damping_ratio(leakage_h: float, c_par_f: float, r_ohm: float, cs_f: float) -> float:
    """Damping ratio of the dominant pole pair of the node with an Rs–Cs snubber across Cpar.

    Derivation: the node admittance of L ∥ Cpar ∥ (R + 1/(s·Cs)) is
    Y(s) = 1/(sL) + s·Cpar + s·Cs/(1 + s·R·Cs). Its zeros are the natural frequencies; multiplying
    by s·L·(1 + s·R·Cs) gives the characteristic polynomial

        L·Cpar·R·Cs·s³ + L·(Cpar + Cs)·s² + R·Cs·s + 1 = 0.

    Its roots (``numpy.roots``) are one real pole and either a complex pair or two more real
    poles. The dominant pair is the complex pair, or else the two real poles nearest the origin;
    for a pair (s1, s2) the equivalent second-order ζ = −(s1 + s2) / (2√(s1·s2)), which is
    σ/√(σ² + ωd²) for a complex pair and ≥ 1 for a real one. As Cs ≫ Cpar the branch acts as R
    alone and ζ tends to √(L/Cpar)/(2R), the parallel RLC value (0.5 at R = √(L/Cpar)).
    """
    roots = np.roots(_characteristic(leakage_h, c_par_f, r_ohm, cs_f))
    complex_roots = roots[np.abs(roots.imag) > 1e-9 * np.abs(roots)]
    if complex_roots.size:
        pair = complex_roots[:2]
    else:
        pair = roots.real[np.argsort(np.abs(roots.real))][:2]
    s1, s2 = pair
    return float((-(s1 + s2) / (2 * np.sqrt(s1 * s2))).real)


def loaded_ring_network(
    ring_freq_hz: float, damping_ratio: float, rs_ohm: float, cs_f: float
) -> tuple[float, float]:
    """(L, Cpar) of the node L — Cpar ∥ (Rs + Cs) whose dominant pole is the measured ring.

    The pole is λ = −σ + jωd with ωd = 2π·f (the damped ring frequency) and σ = ζ·ωd/√(1 − ζ²).
    Substituting it in the characteristic equation L·Cpar·Rs·Cs·λ³ + L·(Cpar + Cs)·λ² + Rs·Cs·λ
    + 1 = 0 (see :func:`snubber_damping_ratio`) gives X·(Rs·Cs·λ³ + λ²) + L·Cs·λ² = −(Rs·Cs·λ + 1)
    with X = L·Cpar: one complex equation, two real ones, in the two real unknowns (X, L); so the
    answer is unique.

    Raises
    ------
    DesignInputError
        When the inputs are not positive, ζ is not below 1, or no positive L and Cpar give this
        ring with this damper (e.g. more damping than the damper can give).
    """
    for name, value in (
        ("ring_freq_hz", ring_freq_hz),
        ("damping_ratio", damping_ratio),
        ("snubber_r_ohm", rs_ohm),
        ("snubber_c_f", cs_f),
    ):
        _positive(name, value)
    if not damping_ratio < 1:
        raise DesignInputError(
            f"damping_ratio must be below 1 for a ring, got {damping_ratio:g}; a node that does "
            "not ring gives no frequency to size from"
        )
    omega_d = 2 * math.pi * ring_freq_hz
    pole = complex(-damping_ratio * omega_d / math.sqrt(1 - damping_ratio**2), omega_d)
    tau = rs_ohm * cs_f
    x_coefficient = tau * pole**3 + pole**2
    l_coefficient = cs_f * pole**2
    rhs = -(tau * pole + 1)
    system = np.array(
        [[x_coefficient.real, l_coefficient.real], [x_coefficient.imag, l_coefficient.imag]]
    )
    x, l_h = np.linalg.solve(system, [rhs.real, rhs.imag])
    if not (x > 0 and l_h > 0):
        raise DesignInputError(
            f"no positive L and Cpar ring at {ring_freq_hz:g} Hz with damping_ratio "
            f"{damping_ratio:g} behind snubber_r_ohm {rs_ohm:g} Ω and snubber_c_f {cs_f:g} F: "
            "check that the damper values are the ones fitted when the ring was measured"
        )
    return float(l_h), float(x / l_h)


def best_damping_resistance_ohm(leakage_h: float, c_par_f: float, cs_f: float) -> float:
    """The Rs that damps the ring of L — Cpar ∥ (Rs + Cs) most for this Cs.

    That is the largest damping ratio of the dominant pole pair (:func:`snubber_damping_ratio`),
    found between 0.05 and 20 times √(L/Cpar) by bounded scalar minimisation on log R
    (``scipy.optimize.minimize_scalar``, Brent's method). For Cs of about 3 × Cpar it is near
    √(L/Cpar) (ζ ≈ 0.5); for Cs below Cpar it is several times larger. When Cs is so large that
    the best R would overdamp the node (ζ above 1: a slow real pole left to settle), the R that
    damps it critically is taken instead, of the two such R the one whose slowest pole decays
    fastest (``scipy.optimize.brentq``).
    """
    from scipy.optimize import brentq, minimize_scalar  # imported here: it takes ~0.3 s

    z0 = characteristic_impedance_ohm(leakage_h, c_par_f)

    def zeta(log_r: float) -> float:
        return snubber_damping_ratio(leakage_h, c_par_f, z0 * math.exp(log_r), cs_f)

    low, high = math.log(0.05), math.log(20.0)
    best = float(minimize_scalar(lambda x: -zeta(x), bounds=(low, high), method="bounded").x)
    if zeta(best) <= 1.0:
        return z0 * math.exp(best)
    critical = [
        brentq(lambda x: zeta(x) - 1.0, a, b, xtol=1e-9)
        for a, b in ((low, best), (best, high))
        if (zeta(a) - 1.0) * (zeta(b) - 1.0) < 0
    ]

    def slowest_decay(log_r: float) -> float:
        roots = np.roots(_characteristic(leakage_h, c_par_f, z0 * math.exp(log_r), cs_f))
        return float(np.min(-roots.real))

    return z0 * math.exp(max(critical, key=slowest_decay, default=best))


def leakage_energy_loss_w(leakage_h: float, peak_current_a: float, fsw_hz: float) -> float:
    """½·L·Ipk²·fsw: the leakage inductance's energy, which an RC damper's resistor absorbs each
    cycle on top of Cs·V²·fsw when there is no clamp to take it (the ring it drives decays in the
    damper: common practice, no published source)."""
    return 0.5 * leakage_h * peak_current_a**2 * fsw_hz


def _positive(name: str, value: float | None) -> None:
    if value is not None and not (math.isfinite(value) and value > 0):
        raise DesignInputError(f"{name} must be a positive number, got {value!r}")


@dataclass(frozen=True)
class SnubberProposal:
    """Result of :func:`propose_snubber`; None where the inputs do not determine a value.

    ``network_from`` says how L and Cpar were found: "leakage" (the bare ring and a known L),
    "added capacitance" or "loaded ring" (one ring measured with a known damper fitted).
    ``z0_ohm`` is √(L/Cpar); ``r_ohm`` the proposed resistor for the proposed ``cs_f``.
    """

    ring_freq_hz: float | None
    c_par_f: float | None
    l_leak_h: float | None
    r_ohm: float | None
    cs_f: float | None
    loss_w: float | None
    damping_ratio: float | None
    cs_source: str | None
    z0_ohm: float | None = None
    network_from: str | None = None
    warnings: list[str] = field(default_factory=list)

    def as_dict(self) -> dict[str, object]:
        """Plain dict of SI numbers for JSON."""
        return asdict(self)


def snubber_network(
    *,
    ring_freq_hz: float,
    leakage_h: float | None = None,
    added_cap_f: float | None = None,
    ring_freq_added_hz: float | None = None,
    damping_ratio: float | None = None,
    snubber_r_ohm: float | None = None,
    snubber_c_f: float | None = None,
) -> tuple[float | None, float | None, str | None]:
    """(L, Cpar, how) of the node from one of the three measurements, or (None, None, None).

    Raises
    ------
    DesignInputError
        When the inputs mix two ways, or a way is given half.
    """
    loaded = {"damping_ratio": damping_ratio, "snubber_r_ohm": snubber_r_ohm,
              "snubber_c_f": snubber_c_f}  # fmt: skip
    ways = [
        name
        for name, given in (
            ("leakage_h", leakage_h is not None),
            ("added_cap_f + ring_freq_added_hz", added_cap_f is not None),
            ("damping_ratio + snubber_r_ohm + snubber_c_f", damping_ratio is not None),
        )
        if given
    ]
    if len(ways) > 1:
        raise DesignInputError(f"give one way to find L and Cpar, not {' and '.join(ways)}")
    if (added_cap_f is None) != (ring_freq_added_hz is None):
        raise DesignInputError(
            "added_cap_f and ring_freq_added_hz go together: the added capacitance and the ring "
            "frequency measured with it"
        )
    if any(v is not None for v in loaded.values()) and any(v is None for v in loaded.values()):
        missing = ", ".join(name for name, v in loaded.items() if v is None)
        raise DesignInputError(
            "damping_ratio, snubber_r_ohm and snubber_c_f go together (the ring measured with a "
            f"known damper fitted): {missing} missing"
        )
    if added_cap_f is not None and ring_freq_added_hz is not None:
        c_par_f, l_leak_h = added_capacitance_method(ring_freq_hz, ring_freq_added_hz, added_cap_f)
        return l_leak_h, c_par_f, "added capacitance"
    if damping_ratio is not None and snubber_r_ohm is not None and snubber_c_f is not None:
        l_leak_h, c_par_f = loaded_ring_network(
            ring_freq_hz, damping_ratio, snubber_r_ohm, snubber_c_f
        )
        return l_leak_h, c_par_f, "loaded ring"
    if leakage_h is not None:
        return leakage_h, parasitic_capacitance_f(ring_freq_hz, leakage_h), "leakage"
    return None, None, None


def propose_snubber(
    *,
    ring_freq_hz: float | Sequence[float] | None = None,
    leakage_h: float | None = None,
    added_cap_f: float | None = None,
    ring_freq_added_hz: float | None = None,
    damping_ratio: float | None = None,
    snubber_r_ohm: float | None = None,
    snubber_c_f: float | None = None,
    volts: float | None = None,
    fsw_hz: float | None = None,
    loss_budget_w: float | None = None,
    cs_f: float | None = None,
) -> SnubberProposal:
    """Propose Rs and Cs from a measured ring and a way to find L and Cpar.

    Parameters
    ----------
    ring_freq_hz : ring frequency, or several measured ring frequencies (their median is used).
    leakage_h : known leakage inductance (the first way to find Cpar, from the bare ring).
    added_cap_f, ring_freq_added_hz : the second way: a known added capacitance and the ring
        frequency with it fitted.
    damping_ratio, snubber_r_ohm, snubber_c_f : the third way: the ring's damping ratio, measured
        with this Rs–Cs damper fitted (``ring_freq_hz`` is then that loaded ring's frequency).
    volts, fsw_hz : step voltage at the node and switching frequency, for Cs and its loss.
    loss_budget_w : the most the resistor may dissipate: caps Cs at P/(V²·fsw).
    cs_f : a chosen Cs instead; its loss is Cs·V²·fsw.

    Returns
    -------
    SnubberProposal: Cs is ``cs_f``, or 3 × Cpar capped by the budget; Rs the resistance that
    damps the ring most with that Cs (:func:`best_damping_resistance_ohm`). Warnings when Cs ends
    below Cpar or below the conventional 3–4 × Cpar (common practice, no published source).

    Raises
    ------
    DesignInputError
        For non-positive values or combinations that do not go together.
    """
    if ring_freq_hz is not None and not isinstance(ring_freq_hz, int | float):
        frequencies = [float(f) for f in ring_freq_hz]
        if not frequencies:
            raise DesignInputError("ring_freq_hz: the list of measured ring frequencies is empty")
        for f in frequencies:
            _positive("ring_freq_hz", f)
        ring_freq_hz = float(np.median(frequencies))
    for name, value in (
        ("ring_freq_hz", ring_freq_hz),
        ("leakage_h", leakage_h),
        ("added_cap_f", added_cap_f),
        ("ring_freq_added_hz", ring_freq_added_hz),
        ("damping_ratio", damping_ratio),
        ("snubber_r_ohm", snubber_r_ohm),
        ("snubber_c_f", snubber_c_f),
        ("volts", volts),
        ("fsw_hz", fsw_hz),
        ("loss_budget_w", loss_budget_w),
        ("cs_f", cs_f),
    ):
        _positive(name, value)
    if ring_freq_hz is None:
        raise DesignInputError("ring_freq_hz is needed: the measured ring frequency")
    if loss_budget_w is not None and cs_f is not None:
        raise DesignInputError("give either loss_budget_w or cs_f, not both")
    if (loss_budget_w is not None or cs_f is not None) and (volts is None or fsw_hz is None):
        raise DesignInputError("loss_budget_w and cs_f need volts and fsw_hz")
    l_leak_h, c_par_f, network_from = snubber_network(
        ring_freq_hz=ring_freq_hz,
        leakage_h=leakage_h,
        added_cap_f=added_cap_f,
        ring_freq_added_hz=ring_freq_added_hz,
        damping_ratio=damping_ratio,
        snubber_r_ohm=snubber_r_ohm,
        snubber_c_f=snubber_c_f,
    )

    cs_source = "chosen" if cs_f is not None else None
    if cs_f is None and c_par_f is not None:
        cs_f, cs_source = CONVENTIONAL_CS_RATIO[0] * c_par_f, "3 × Cpar"
    if loss_budget_w is not None and volts is not None and fsw_hz is not None:
        cap_f = capacitance_for_loss_f(loss_budget_w, volts, fsw_hz)
        if cs_f is None or cap_f < cs_f:
            cs_f, cs_source = cap_f, "loss budget"
        else:
            cs_source = f"{cs_source}, within the loss budget"
    return _proposal(ring_freq_hz, l_leak_h, c_par_f, cs_f, cs_source, network_from, volts, fsw_hz)


def _proposal(
    ring_freq_hz: float | None,
    l_leak_h: float | None,
    c_par_f: float | None,
    cs_f: float | None,
    cs_source: str | None,
    network_from: str | None,
    volts: float | None,
    fsw_hz: float | None,
) -> SnubberProposal:
    """The proposal for a known Cs: its best Rs, the ring's damping, the loss and warnings."""
    loss_w = cv2f_loss_w(cs_f, volts, fsw_hz) if cs_f and volts and fsw_hz else None
    z0 = r_ohm = damping = None
    warnings: list[str] = []
    if c_par_f is not None and l_leak_h is not None:
        z0 = characteristic_impedance_ohm(l_leak_h, c_par_f)
    if cs_f is not None and c_par_f is not None and l_leak_h is not None:
        r_ohm = best_damping_resistance_ohm(l_leak_h, c_par_f, cs_f)
        damping = snubber_damping_ratio(l_leak_h, c_par_f, r_ohm, cs_f)
        ratio = cs_f / c_par_f
        low, high = CONVENTIONAL_CS_RATIO
        if ratio < 1:
            warnings.append(
                f"Cs from the {cs_source} is below Cpar (Cs/Cpar = {ratio:.2g}): an RC snubber "
                "cannot damp this ring within it; a clamp is the better tool"
            )
        elif ratio < low:
            warnings.append(
                f"Cs/Cpar = {ratio:.2g} is below the usual {low:g}–{high:g}: expect weaker damping"
            )
    return SnubberProposal(
        ring_freq_hz=ring_freq_hz,
        c_par_f=c_par_f,
        l_leak_h=l_leak_h,
        r_ohm=r_ohm,
        cs_f=cs_f,
        loss_w=loss_w,
        damping_ratio=damping,
        cs_source=cs_source,
        z0_ohm=z0,
        network_from=network_from,
        warnings=warnings,
    )


@dataclass(frozen=True)
class PartSet:
    """One Rs–Cs for every point of a run, checked at its worst-step corner (SI units).

    ``damping_ratios`` are the ring's damping ratio with these parts at each point, in the order
    of the points given; ``worst_step_loss_w`` is Cs·V²·fsw at the largest step.
    """

    r_ohm: float
    cs_f: float
    cs_source: str
    worst_step_v: float
    worst_step_loss_w: float
    min_damping_ratio: float
    damping_ratios: list[float]

    def as_dict(self) -> dict[str, object]:
        """Plain dict of SI numbers for JSON."""
        return asdict(self)


def propose_part_set(
    networks: Sequence[tuple[float, float, float]],
    fsw_hz: float,
    *,
    loss_budget_w: float | None = None,
    cs_f: float | None = None,
) -> PartSet:
    """One Rs–Cs that holds at every point: ``networks`` are each point's (L, Cpar, step volts).

    Cs is ``cs_f``, or 3 × the largest Cpar (the slowest, most capacitive node needs the most),
    capped so that Cs·V²·fsw stays within ``loss_budget_w`` at the largest step (the worst-step
    corner: there the resistor burns most). Rs is the best for that Cs at the worst-step corner
    (:func:`best_damping_resistance_ohm`); the damping ratio it gives is reported at every point.
    """
    if not networks:
        raise DesignInputError("no point to size a part set for")
    worst = max(range(len(networks)), key=lambda k: networks[k][2])
    l_worst, c_worst, v_worst = networks[worst]
    source = "chosen"
    if cs_f is None:
        cs_f, source = CONVENTIONAL_CS_RATIO[0] * max(c for _, c, _ in networks), "3 × Cpar"
        if loss_budget_w is not None:
            cap_f = capacitance_for_loss_f(loss_budget_w, v_worst, fsw_hz)
            if cap_f < cs_f:
                cs_f, source = cap_f, "loss budget at the worst-step corner"
    r_ohm = best_damping_resistance_ohm(l_worst, c_worst, cs_f)
    zetas = [snubber_damping_ratio(l_h, c_f, r_ohm, cs_f) for l_h, c_f, _ in networks]
    return PartSet(
        r_ohm=r_ohm,
        cs_f=cs_f,
        cs_source=source,
        worst_step_v=v_worst,
        worst_step_loss_w=cv2f_loss_w(cs_f, v_worst, fsw_hz),
        min_damping_ratio=min(zetas),
        damping_ratios=zetas,
    )


def rcd_clamp_loss_w(
    leakage_h: float,
    peak_current_a: float,
    fsw_hz: float,
    clamp_voltage_v: float,
    reflected_voltage_v: float,
) -> float:
    """Clamp dissipation P = ½·Llk·Ipk²·fsw·Vclamp/(Vclamp − Vr) (AN-4147, from memory).

    While the clamp diode conducts, the clamp holds the leakage inductance at Vclamp − Vr, so its
    current falls linearly from Ipk in Llk·Ipk/(Vclamp − Vr); the clamp absorbs Vclamp times that
    current, ½·Llk·Ipk²·Vclamp/(Vclamp − Vr) per cycle: the leakage energy plus what the
    reflected voltage delivers meanwhile.
    """
    if not clamp_voltage_v > reflected_voltage_v:
        raise DesignInputError(
            f"clamp_voltage_v ({clamp_voltage_v:g} V) must be above reflected_voltage_v "
            f"({reflected_voltage_v:g} V): at or below the reflected voltage the clamp would "
            "conduct the output's energy, not just the leakage energy"
        )
    return (
        0.5
        * leakage_h
        * peak_current_a**2
        * fsw_hz
        * clamp_voltage_v
        / (clamp_voltage_v - reflected_voltage_v)
    )


@dataclass(frozen=True)
class ClampProposal:
    """An RCD clamp sized by :func:`propose_clamp`; SI units."""

    clamp_voltage_v: float
    clamp_ripple_v: float
    clamp_loss_w: float
    clamp_r_ohm: float
    clamp_c_f: float

    def as_dict(self) -> dict[str, float]:
        """Plain dict of SI numbers for JSON."""
        return asdict(self)


def propose_clamp(
    *,
    leakage_h: float | None,
    peak_current_a: float | None,
    fsw_hz: float | None,
    reflected_voltage_v: float | None,
    clamp_voltage_v: float | None,
    clamp_ripple_v: float | None,
) -> ClampProposal:
    """Size an RCD clamp: loss P, resistor R = Vclamp²/P, capacitor C = Vclamp/(ΔV·R·fsw).

    Parameters
    ----------
    leakage_h : leakage inductance Llk.
    peak_current_a : peak primary current Ipk at the worst operating point.
    fsw_hz : switching frequency.
    reflected_voltage_v : Vr = n·(Vout + Vf).
    clamp_voltage_v : chosen clamp capacitor voltage above the bus, Vclamp > Vr.
    clamp_ripple_v : chosen ripple ΔV of the clamp capacitor voltage.

    Raises
    ------
    DesignInputError
        When an input is missing or not positive, or Vclamp ≤ Vr.

    Notes
    -----
    Fairchild AN-4147, "Design Guidelines for RCD Snubber of Flyback Converters" (formulas
    recalled from memory, see :func:`rcd_clamp_loss_w`).
    """
    inputs = {
        "leakage_h": leakage_h,
        "peak_current_a": peak_current_a,
        "fsw_hz": fsw_hz,
        "reflected_voltage_v": reflected_voltage_v,
        "clamp_voltage_v": clamp_voltage_v,
        "clamp_ripple_v": clamp_ripple_v,
    }
    missing = [name for name, value in inputs.items() if value is None]
    if missing:
        raise DesignInputError(f"the clamp sizing needs {', '.join(missing)}")
    for name, value in inputs.items():
        _positive(name, value)
    if not clamp_ripple_v < clamp_voltage_v:
        raise DesignInputError(
            f"clamp_ripple_v ({clamp_ripple_v:g} V) must be a small part of clamp_voltage_v "
            f"({clamp_voltage_v:g} V), e.g. 5-10 % of it"
        )
    loss_w = rcd_clamp_loss_w(
        leakage_h, peak_current_a, fsw_hz, clamp_voltage_v, reflected_voltage_v
    )
    r_ohm = clamp_voltage_v**2 / loss_w
    return ClampProposal(
        clamp_voltage_v=clamp_voltage_v,
        clamp_ripple_v=clamp_ripple_v,
        clamp_loss_w=loss_w,
        clamp_r_ohm=r_ohm,
        clamp_c_f=clamp_voltage_v / (clamp_ripple_v * r_ohm * fsw_hz),
    )


def cheaper_tool(rc_loss_w: float, clamp_loss_w: float) -> str:
    """Which of the two dissipates less: ``"rc damper"`` or ``"rcd clamp"`` (a tie: the damper,
    which also damps the ring)."""
    return "rcd clamp" if clamp_loss_w < rc_loss_w else "rc damper"
