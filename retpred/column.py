"""Column physics: HSM class parameters, dead time, viscosity, diffusion, plates, pressure.

Units are in the names (``length_mm``, ``flow_ml_min``, ``viscosity_mpa_s``). Every function
that takes compositions or molecular weights is vectorised with numpy broadcasting. The
relations are those of ``shared/design/retention-physics.md`` sections 1, 5 and 6; each
docstring names its equation and source. Values marked "from memory" were recalled, not read.
"""

from __future__ import annotations

import csv
import math
from functools import lru_cache
from importlib import resources

import numpy as np

from retpred.errors import MethodError
from retpred.method import PHASE_CLASSES, Column, HsmParameters, Method

KELVIN = 273.15
T_REF_K = 298.15

# --- HSM column classes -------------------------------------------------------------------

_HSM_FIELDS = ("H", "S", "A", "B", "C28", "C70", "kEB")


@lru_cache(maxsize=1)
def _class_table() -> dict[str, HsmParameters]:
    """Read ``retpred/data/column_classes.tsv`` once (written by
    ``scripts/build_column_classes.py``)."""
    text = resources.files("retpred").joinpath("data/column_classes.tsv").read_text("utf-8")
    rows = csv.DictReader(
        (ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")),
        delimiter="\t",
    )
    table = {}
    for row in rows:
        table[row["phase"]] = HsmParameters(**{f: float(row[f]) for f in _HSM_FIELDS})
    return table


def class_hsm(phase: str) -> HsmParameters:
    """Median hydrophobic-subtraction parameters of a phase class ("C18", "C8", "phenyl",
    "polar-embedded", "CN"), from the public HSM column table (via open-rp / RepoRT,
    CC BY-SA 4.0). Case-insensitive; an unknown class raises :class:`MethodError`."""
    table = _class_table()
    key = {p.lower(): p for p in table}.get(str(phase).strip().lower())
    if key is None:
        raise MethodError(
            f"unknown column phase class '{phase}'; use one of {', '.join(PHASE_CLASSES)}",
            field="column.phase",
        )
    return table[key]


def column_hsm(column: Column) -> HsmParameters:
    """The column's own HSM parameters when given, else the median of its phase class."""
    return column.hsm if column.hsm is not None else class_hsm(column.phase)


# --- Dead time ----------------------------------------------------------------------------


def void_volume_ml(length_mm, inner_diameter_mm) -> float:
    """Column void volume Vm = 0.5 * L * dc^2 (mL; L, dc in cm). Rule of thumb
    (retention-physics.md section 1): 150 x 4.6 mm gives about 1.6 mL. It equals a total
    porosity of 0.5 / (pi / 4) = 0.64."""
    length_cm = np.asarray(length_mm, dtype=float) / 10.0
    dc_cm = np.asarray(inner_diameter_mm, dtype=float) / 10.0
    out = 0.5 * length_cm * dc_cm**2
    return float(out) if out.ndim == 0 else out


def _check_flow(flow_ml_min) -> np.ndarray:
    flow = np.asarray(flow_ml_min, dtype=float)
    if not np.all(np.isfinite(flow)) or np.any(flow <= 0):
        raise MethodError(f"flow must be > 0 mL/min, got {flow_ml_min}", field="flow_ml_min")
    return flow


def dead_time_min(column: Column, flow_ml_min: float) -> float:
    """Dead time t0 (min): ``column.dead_time_min`` if given, else t0 = Vm / F."""
    if column.dead_time_min is not None:
        return float(column.dead_time_min)
    flow = _check_flow(flow_ml_min)
    return float(void_volume_ml(column.length_mm, column.inner_diameter_mm) / flow)


# --- Viscosity of water/organic mixtures -------------------------------------------------

# Pure water, Vogel form eta = A * 10^(B / (T - C)) with A = 2.414e-5 Pa s, B = 247.8 K,
# C = 140 K (a widely quoted correlation, from memory); 0.890 mPa s at 25 C (CRC handbook).
_WATER_VOGEL = (2.414e-2, 247.8, 140.0)  # A in mPa s
# Pure organics, Andrade form eta = eta_25 * exp(B (1/T - 1/298.15)).
# Methanol: 0.544 mPa s at 25 C and 0.396 at 50 C (CRC handbook, from memory) -> B = 1225 K.
# Acetonitrile: 0.344 mPa s at 25 C and 0.38 at 15 C (solvent property tables, from memory)
# -> B = 855 K.
_ORGANIC_ANDRADE = {"methanol": (0.544, 1225.0), "acetonitrile": (0.344, 855.0)}
# Excess term of the mixture (Redlich-Kister-type expansion of the excess ln eta on volume
# fraction): phi (1 - phi) (c0 + c1 (1 - 2 phi)) * (298.15 / T), i.e. the Chen-Horvath-type
# form phi (1 - phi) (a + b / T) with a = 0 (excess activation free energy taken constant in
# T). The coefficients are our own fit to recalled values at 25 C (from memory): methanol/
# water maximum about 1.62 mPa s near 42 % methanol; acetonitrile/water maximum about
# 0.99 mPa s near 18 % acetonitrile. Checks not used in the fit are in tests/test_column.py.
_EXCESS = {"methanol": (3.30, 0.0), "acetonitrile": (1.332, 0.857)}


def _organic_key(organic: str) -> str:
    key = str(organic).strip().lower()
    aliases = {"acn": "acetonitrile", "mecn": "acetonitrile", "meoh": "methanol"}
    key = aliases.get(key, key)
    if key not in _ORGANIC_ANDRADE:
        raise MethodError(
            f"unknown organic solvent '{organic}'; use acetonitrile or methanol",
            field="mobile_phase.organic",
        )
    return key


def _temperature_k(temperature_c) -> np.ndarray:
    t = np.asarray(temperature_c, dtype=float) + KELVIN
    if np.any(~np.isfinite(t)) or np.any(t <= 250.0) or np.any(t >= 400.0):
        raise MethodError(
            f"temperature must be between -23 and 126 C, got {temperature_c}",
            field="mobile_phase.temperature_c",
        )
    return t


def water_viscosity_mpa_s(temperature_c) -> np.ndarray:
    """Viscosity of water (mPa s), Vogel equation eta = A 10^(B / (T - C)) (from memory)."""
    a, b, c = _WATER_VOGEL
    return a * 10.0 ** (b / (_temperature_k(temperature_c) - c))


def organic_viscosity_mpa_s(organic: str, temperature_c) -> np.ndarray:
    """Viscosity of pure methanol or acetonitrile (mPa s), Andrade equation ln eta = A + B/T
    through recalled handbook values (see module constants)."""
    eta25, b = _ORGANIC_ANDRADE[_organic_key(organic)]
    return eta25 * np.exp(b * (1.0 / _temperature_k(temperature_c) - 1.0 / T_REF_K))


def viscosity_mpa_s(phi, organic: str, temperature_c) -> np.ndarray:
    """Viscosity (mPa s) of a water/organic mixture of organic volume fraction ``phi``:

    ln eta = phi ln eta_org + (1 - phi) ln eta_w + phi (1 - phi) (c0 + c1 (1 - 2 phi)) T0/T

    (log-additive mixing with an excess term, the form of Chen and Horvath's eluent
    correlations; coefficients fitted by us to recalled values, see module constants).
    Volume contraction on mixing is neglected.
    """
    key = _organic_key(organic)
    p = np.asarray(phi, dtype=float)
    if np.any(p < -1e-9) or np.any(p > 1 + 1e-9):
        raise MethodError(f"organic fraction must be within 0-1, got {phi}", field="phi")
    p = np.clip(p, 0.0, 1.0)
    t_k = _temperature_k(temperature_c)
    c0, c1 = _EXCESS[key]
    ln_eta = (
        p * np.log(organic_viscosity_mpa_s(key, temperature_c))
        + (1.0 - p) * np.log(water_viscosity_mpa_s(temperature_c))
        + p * (1.0 - p) * (c0 + c1 * (1.0 - 2.0 * p)) * (T_REF_K / t_k)
    )
    return np.exp(ln_eta)


# --- Diffusion ----------------------------------------------------------------------------

# Wilke-Chang association factors psi and molar masses M (g/mol) (Wilke & Chang, AIChE J.
# 1 (1955) 264; values from memory): water 2.6, methanol 1.9, unassociated solvents 1.0
# (acetonitrile taken as 1.0).
_WILKE_CHANG = {"water": (2.6, 18.015), "methanol": (1.9, 32.04), "acetonitrile": (1.0, 41.05)}
# Solute molar volume at its normal boiling point, V_A ~ 1.1 * MW (cm3/mol). Our estimate:
# Le Bas volumes of small organics run about 1.0-1.3 * MW (benzene 96 for MW 78, naphthalene
# 148 for MW 128; from memory); heteroatom-rich drugs sit at the low end.
MOLAR_VOLUME_PER_MW = 1.1


def diffusion_coefficient_cm2_s(
    mw, viscosity_mpa_s, temperature_c, organic: str, phi, molar_volume_cm3_mol=None
) -> np.ndarray:
    """Solute diffusion coefficient Dm (cm2/s), Wilke-Chang equation

        Dm = 7.4e-8 (psi M)^0.5 T / (eta V_A^0.6)

    (eta in mPa s, T in K, V_A solute molar volume in cm3/mol; Wilke and Chang 1955). For the
    water/organic mixture psi*M is the volume-fraction weighted mean of the two solvents'.
    V_A is ``molar_volume_cm3_mol`` when given, else 1.1 * ``mw``.
    """
    key = _organic_key(organic)
    p = np.clip(np.asarray(phi, dtype=float), 0.0, 1.0)
    psi_w, m_w = _WILKE_CHANG["water"]
    psi_o, m_o = _WILKE_CHANG[key]
    psi_m = (1.0 - p) * psi_w * m_w + p * psi_o * m_o
    if molar_volume_cm3_mol is None:
        v_a = MOLAR_VOLUME_PER_MW * np.asarray(mw, dtype=float)
    else:
        v_a = np.asarray(molar_volume_cm3_mol, dtype=float)
    t_k = _temperature_k(temperature_c)
    return 7.4e-8 * np.sqrt(psi_m) * t_k / (np.asarray(viscosity_mpa_s, float) * v_a**0.6)


# --- Efficiency ---------------------------------------------------------------------------


def reduced_plate_height(nu, a=1.0, b=2.0, c=0.05) -> np.ndarray:
    """Knox equation h = A nu^(1/3) + B / nu + C nu (reduced plate height vs reduced velocity;
    A = 1, B = 2, C = 0.05 for a well-packed fully porous column, common practice)."""
    nu = np.asarray(nu, dtype=float)
    return a * np.cbrt(nu) + b / nu + c * nu


def plate_number(
    column: Column, flow_ml_min, phi, organic: str, temperature_c, mw, knox=(1.0, 2.0, 0.05)
) -> np.ndarray:
    """Plate number N = L / (h dp), h from the Knox equation at nu = u dp / Dm, with the
    linear velocity u = L / t0 and Dm from Wilke-Chang at the eluent's viscosity
    (retention-physics.md section 6)."""
    t0_s = dead_time_min(column, flow_ml_min) * 60.0
    length_cm = column.length_mm / 10.0
    dp_cm = column.particle_um * 1e-4
    u_cm_s = length_cm / t0_s
    eta = viscosity_mpa_s(phi, organic, temperature_c)
    dm = diffusion_coefficient_cm2_s(mw, eta, temperature_c, organic, phi)
    h = reduced_plate_height(u_cm_s * dp_cm / dm, *knox)
    return length_cm / (h * dp_cm)


# --- Pressure -----------------------------------------------------------------------------

# Flow-resistance factor on the superficial velocity from the Kozeny-Carman equation,
# Phi = 180 (1 - e)^2 / e^3 with interparticle porosity e = 0.38 (a randomly packed bed of
# spheres, about 0.36-0.40; common practice): about 1260. On the chromatographic velocity
# u0 = L / t0 this is Phi * 0.64 ~ 800, within the 500-1000 of retention-physics.md section 6.
KOZENY_CARMAN_FLOW_RESISTANCE = 180.0 * (1 - 0.38) ** 2 / 0.38**3


def backpressure_bar(
    column: Column, flow_ml_min, viscosity_mpa_s, flow_resistance=KOZENY_CARMAN_FLOW_RESISTANCE
) -> np.ndarray:
    """Column pressure drop (bar), Darcy's law for a packed bed dP = Phi eta L u_s / dp^2,
    u_s = F / (pi dc^2 / 4) the superficial velocity (SI units inside). Extra-column
    pressure of the instrument is not included."""
    flow_m3_s = np.asarray(flow_ml_min, dtype=float) * 1e-6 / 60.0
    area_m2 = math.pi * (column.inner_diameter_mm * 1e-3) ** 2 / 4.0
    u_s = flow_m3_s / area_m2
    eta_pa_s = np.asarray(viscosity_mpa_s, dtype=float) * 1e-3
    dp_m = column.particle_um * 1e-6
    dp_pa = flow_resistance * eta_pa_s * (column.length_mm * 1e-3) * u_s / dp_m**2
    return dp_pa / 1e5


def max_backpressure_bar(method: Method, n_samples: int = 2001) -> tuple[float, float]:
    """(Highest column pressure in bar, time in min where it occurs) over the pump program.

    The program is sampled densely from 0 to its end plus the time to push the final eluent
    through dwell volume and column (the pump holding its last row). The dwell delay is
    included: the column holds the eluent that left the mixer between V - VD - Vm and V - VD
    (V pumped volume), and since Darcy's law is linear in eta along the bed, the pressure uses
    the mean viscosity of those column contents.
    """
    times, phis, flows = method.phi_program()
    flows = [method.gradient.flow_ml_min if f is None else f for f in flows]
    flow_arr = _check_flow(flows)
    t_prog = np.asarray(times, dtype=float)
    phi_prog = np.asarray(phis, dtype=float)
    col = method.column
    vd_ml = method.dwell_volume_ml
    if col.dead_time_min is not None:
        vm_ml = col.dead_time_min * method.gradient.flow_ml_min
    else:
        vm_ml = void_volume_ml(col.length_mm, col.inner_diameter_mm)
    t_end = float(t_prog[-1]) + (vd_ml + vm_ml) / float(flow_arr[-1])
    t = np.union1d(np.linspace(0.0, t_end, n_samples), t_prog)
    flow_t = np.interp(t, t_prog, flow_arr)
    phi_t = np.interp(t, t_prog, phi_prog)
    vol = np.concatenate([[0.0], np.cumsum(0.5 * (flow_t[1:] + flow_t[:-1]) * np.diff(t))])
    # Column contents at each time: eluent volumes (mixer outlet) in [V - VD - Vm, V - VD];
    # before the program starts the system holds the initial composition (interp clamps).
    frac = (np.arange(32) + 0.5) / 32.0
    v_slices = vol[:, None] - vd_ml - vm_ml * frac[None, :]
    phi_col = np.interp(v_slices, vol, phi_t)
    eta_mean = viscosity_mpa_s(phi_col, method.mobile_phase.organic, method.temperature_c)
    pressure = backpressure_bar(col, flow_t, eta_mean.mean(axis=1))
    i = int(np.argmax(pressure))
    return float(pressure[i]), float(t[i])


def peak_capacity(gradient_time_min, sigma_min_typical) -> float:
    """Gradient peak capacity n_c = 1 + t_G / (4 sigma) (common practice; 4-sigma peaks)."""
    out = 1.0 + np.asarray(gradient_time_min, float) / (4.0 * np.asarray(sigma_min_typical, float))
    return float(out) if out.ndim == 0 else out
