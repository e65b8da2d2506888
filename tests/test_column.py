"""Column physics against handbook values, published equations and common practice.

Sources named beside each value:
- retention-physics.md (shared/design), the project's reference note: rule-of-thumb void
  volume Vm = 0.5 L dc^2, HSM class ordering (section 5), Knox, Darcy (section 6).
- CRC Handbook of Chemistry and Physics, viscosity of water and of liquids (from memory).
- Wilke and Chang, AIChE J. 1 (1955) 264 (the equation itself; constants from memory).
- Common practice: plate numbers, column pressures, Knox minimum.
- The open HSM column table (open-rp, derived from RepoRT, CC BY-SA 4.0), when present.
"""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest
from scipy.optimize import brentq, minimize_scalar

from retpred.column import (
    backpressure_bar,
    class_hsm,
    column_hsm,
    dead_time_min,
    diffusion_coefficient_cm2_s,
    max_backpressure_bar,
    organic_viscosity_mpa_s,
    peak_capacity,
    plate_number,
    reduced_plate_height,
    viscosity_mpa_s,
    void_volume_ml,
    water_viscosity_mpa_s,
)
from retpred.errors import MethodError
from retpred.method import Column, Gradient, HsmParameters, Method, MobilePhase
from retpred.opendata import find_open_data

HPLC = Column("C18", 150.0, 4.6, 5.0)
UHPLC_100 = Column("C18", 100.0, 2.1, 1.7)
UHPLC_50 = Column("C18", 50.0, 2.1, 1.7)

# --- dead time ---------------------------------------------------------------------------


def test_void_volume_rule_of_thumb():
    # retention-physics.md section 1: 150 x 4.6 mm gives about 1.6 mL.
    assert void_volume_ml(150, 4.6) == pytest.approx(1.6, abs=0.05)
    # hand arithmetic of 0.5 * 15 cm * (0.46 cm)^2
    assert void_volume_ml(150, 4.6) == pytest.approx(0.5 * 15 * 0.46**2, rel=1e-12)
    np.testing.assert_allclose(
        void_volume_ml(np.array([50, 100]), 2.1), [0.5 * 5 * 0.21**2, 0.5 * 10 * 0.21**2]
    )


def test_dead_time_from_geometry_and_given():
    # t0 = Vm / F: 1.587 mL at 0.5 mL/min is 3.17 min (hand arithmetic)
    assert dead_time_min(HPLC, 0.5) == pytest.approx(0.5 * 15 * 0.46**2 / 0.5, rel=1e-12)
    given = Column("C18", 150.0, 4.6, 5.0, dead_time_min=1.9)
    assert dead_time_min(given, 0.5) == 1.9
    with pytest.raises(MethodError):
        dead_time_min(HPLC, 0.0)


# --- viscosity ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("temperature_c", "eta_mpa_s", "rel"),
    [
        (25.0, 0.890, 0.005),  # CRC handbook
        (0.0, 1.792, 0.03),  # CRC handbook, from memory
        (20.0, 1.002, 0.01),  # CRC handbook (quoted in its aqueous-solutions table)
        (50.0, 0.547, 0.02),  # CRC handbook, from memory
        (80.0, 0.355, 0.025),  # CRC handbook, from memory
    ],
)
def test_water_viscosity_handbook(temperature_c, eta_mpa_s, rel):
    assert float(water_viscosity_mpa_s(temperature_c)) == pytest.approx(eta_mpa_s, rel=rel)
    assert float(viscosity_mpa_s(0.0, "methanol", temperature_c)) == pytest.approx(
        eta_mpa_s, rel=rel
    )


def test_pure_organic_viscosity_handbook():
    # methanol 0.544 mPa s at 25 C (CRC, from memory; an anchor of the correlation)
    assert float(viscosity_mpa_s(1.0, "methanol", 25.0)) == pytest.approx(0.544, rel=0.01)
    # methanol 0.793 mPa s at 0 C (CRC, from memory; NOT used to set the constants)
    assert float(organic_viscosity_mpa_s("methanol", 0.0)) == pytest.approx(0.793, rel=0.03)
    # acetonitrile about 0.34 mPa s at 25 C (solvent tables, from memory)
    assert float(viscosity_mpa_s(1.0, "acetonitrile", 25.0)) == pytest.approx(0.34, abs=0.02)


def _maximum(organic, temperature_c):
    phi = np.linspace(0, 1, 2001)
    eta = viscosity_mpa_s(phi, organic, temperature_c)
    i = int(np.argmax(eta))
    return phi[i], eta[i]


def test_methanol_water_maximum():
    # ~1.6-1.8 mPa s near 40-50 % methanol at 25 C (from memory); the maximum sits inside
    phi, eta = _maximum("methanol", 25.0)
    assert 1.55 <= eta <= 1.8
    assert 0.35 <= phi <= 0.55
    # at 50 C the maximum is about 1.0 mPa s (from memory; not used in the fit)
    _, eta50 = _maximum("methanol", 50.0)
    assert 0.85 <= eta50 <= 1.1


def test_acetonitrile_water_maximum():
    # about 1.0 mPa s near 10-20 % acetonitrile at 25 C (from memory; ranges)
    phi, eta = _maximum("acetonitrile", 25.0)
    assert 0.9 <= eta <= 1.1
    assert 0.08 <= phi <= 0.25
    # 50:50 at 25 C about 0.7-0.85 mPa s (from memory; not used in the fit); far below the
    # 50:50 methanol/water value (common practice: methanol gives about twice the pressure)
    e_acn = float(viscosity_mpa_s(0.5, "acetonitrile", 25.0))
    assert 0.7 <= e_acn <= 0.85
    assert float(viscosity_mpa_s(0.5, "methanol", 25.0)) > 1.7 * e_acn


def test_viscosity_falls_with_temperature_and_rejects_bad_input():
    phi = np.linspace(0, 1, 11)
    for organic in ("methanol", "acetonitrile"):
        eta = viscosity_mpa_s(phi[:, None], organic, np.array([20.0, 40.0, 60.0]))
        assert eta.shape == (11, 3)
        assert np.all(np.diff(eta, axis=1) < 0)
    with pytest.raises(MethodError):
        viscosity_mpa_s(0.5, "tetrahydrofuran", 25.0)
    with pytest.raises(MethodError):
        viscosity_mpa_s(1.5, "methanol", 25.0)


# --- diffusion ---------------------------------------------------------------------------


def test_wilke_chang_worked_example():
    # Toluene in water at 25 C, Le Bas molar volume 118.2 cm3/mol (from memory).
    # Hand arithmetic of Wilke-Chang: 7.4e-8 * sqrt(2.6 * 18.015) * 298.15 / (0.890 * 118.2^0.6)
    expected = 7.4e-8 * math.sqrt(2.6 * 18.015) * 298.15 / (0.890 * 118.2**0.6)
    d = diffusion_coefficient_cm2_s(
        92.14, 0.890, 25.0, "acetonitrile", 0.0, molar_volume_cm3_mol=118.2
    )
    assert float(d) == pytest.approx(expected, rel=1e-9)
    # Measured toluene in water about 0.85e-5 cm2/s (from memory); Wilke-Chang is good to
    # roughly 10-20 % (from memory).
    assert float(d) == pytest.approx(0.85e-5, rel=0.25)


def test_diffusion_orders_of_magnitude():
    # A small molecule in water: about 1e-5 cm2/s (from memory)
    d_small = diffusion_coefficient_cm2_s(100.0, water_viscosity_mpa_s(25.0), 25.0, "methanol", 0.0)
    assert 0.6e-5 <= float(d_small) <= 1.5e-5
    # MW 300 in 50 % acetonitrile: order 1e-5 cm2/s (from memory)
    eta = viscosity_mpa_s(0.5, "acetonitrile", 25.0)
    d = diffusion_coefficient_cm2_s(300.0, eta, 25.0, "acetonitrile", 0.5)
    assert 3e-6 <= float(d) <= 1.5e-5
    # Heavier solutes diffuse more slowly: D ~ V^-0.6 (Wilke-Chang, exact ratio)
    d2 = diffusion_coefficient_cm2_s(600.0, eta, 25.0, "acetonitrile", 0.5)
    assert float(d2 / d) == pytest.approx(2.0**-0.6, rel=1e-12)


# --- efficiency --------------------------------------------------------------------------


def test_knox_minimum():
    # Analytic minimum: dh/dnu = A/3 nu^(-2/3) - B/nu^2 + C = 0 (A=1, B=2, C=0.05)
    nu_opt = brentq(lambda v: v ** (-2 / 3) / 3 - 2 / v**2 + 0.05, 0.5, 20)
    h_min = nu_opt ** (1 / 3) + 2 / nu_opt + 0.05 * nu_opt
    res = minimize_scalar(
        lambda v: float(reduced_plate_height(v)),
        bounds=(0.5, 20),
        method="bounded",
        options={"xatol": 1e-8},
    )
    assert res.x == pytest.approx(nu_opt, rel=1e-4)
    assert res.fun == pytest.approx(h_min, rel=1e-8)
    # "h about 2 at nu about 3" (common practice: h_min 2-3 for well-packed columns)
    assert 2.5 <= nu_opt <= 4.0
    assert 2.0 <= h_min <= 3.0


def test_plate_numbers_common_practice():
    # 150 x 4.6 mm, 5 um, 1 mL/min, 50 % acetonitrile, 30 C, MW 250: about 10,000-15,000
    # plates (common practice)
    n_hplc = float(plate_number(HPLC, 1.0, 0.5, "acetonitrile", 30.0, 250.0))
    assert 10_000 <= n_hplc <= 15_000
    # 100 x 2.1 mm, 1.7 um, 0.4 mL/min: about 15,000-25,000 (common practice)
    n_uhplc = float(plate_number(UHPLC_100, 0.4, 0.5, "acetonitrile", 30.0, 250.0))
    assert 15_000 <= n_uhplc <= 25_000
    # vectorised over molecules; bigger molecules (slower diffusion, above nu_opt) lose plates
    n = plate_number(HPLC, 1.0, 0.5, "acetonitrile", 30.0, np.array([150.0, 300.0, 600.0]))
    assert n.shape == (3,)
    assert np.all(np.diff(n) < 0)


# --- pressure ----------------------------------------------------------------------------


def test_darcy_hand_example():
    # Phi = 1000, eta = 1 mPa s, L = 0.1 m, u_s = 1 mm/s, dp = 5 um:
    # dP = 1000 * 1e-3 * 0.1 * 1e-3 / (5e-6)^2 Pa = 4.0e6 Pa = 40 bar (hand arithmetic)
    col = Column("C18", 100.0, 4.6, 5.0)
    flow_ml_min = 1e-3 * math.pi * (4.6e-3) ** 2 / 4 * 1e6 * 60
    assert float(backpressure_bar(col, flow_ml_min, 1.0, flow_resistance=1000.0)) == (
        pytest.approx(40.0, rel=1e-9)
    )


def test_darcy_common_practice_pressures():
    eta = viscosity_mpa_s(0.5, "acetonitrile", 25.0)
    # 150 x 4.6 mm, 5 um, 1 mL/min, 50:50 water/acetonitrile: roughly 60-150 bar on the
    # gauge (common practice), which includes a few to ~20 bar of tubing and frits (from
    # memory); the column alone is checked against 45-150 bar.
    p = float(backpressure_bar(HPLC, 1.0, eta))
    assert 45.0 <= p <= 150.0
    # 50 x 2.1 mm, 1.7 um, 0.5 mL/min: UHPLC range, several hundred bar (common practice)
    p_u = float(backpressure_bar(UHPLC_50, 0.5, eta))
    assert 250.0 <= p_u <= 1000.0
    assert p_u > 400.0 * 0.6  # clearly beyond what a 5 um column needs


def test_darcy_scaling_exact():
    eta = 0.8
    half = Column("C18", 150.0, 4.6, 2.5)
    assert float(backpressure_bar(half, 1.0, eta) / backpressure_bar(HPLC, 1.0, eta)) == (
        pytest.approx(4.0, rel=1e-12)
    )  # Darcy: dP ~ 1 / dp^2 at constant flow
    longer = Column("C18", 300.0, 4.6, 5.0)
    assert float(backpressure_bar(longer, 1.0, eta) / backpressure_bar(HPLC, 1.0, eta)) == (
        pytest.approx(2.0, rel=1e-12)
    )
    p = backpressure_bar(HPLC, np.array([0.5, 1.0, 2.0]), eta)
    np.testing.assert_allclose(p / p[0], [1.0, 2.0, 4.0], rtol=1e-12)


def _method(organic, program, dwell_ml=1.0, temperature_c=25.0):
    return Method(
        column=HPLC,
        mobile_phase=MobilePhase(
            organic=organic,
            a_organic_percent=0.0,
            b_organic_percent=100.0,
            temperature_c=temperature_c,
        ),
        gradient=Gradient(flow_ml_min=1.0, program=program, dwell_volume_ml=dwell_ml),
    )


def test_max_backpressure_isocratic_equals_darcy():
    m = _method("acetonitrile", ((0.0, 50.0, 1.0), (10.0, 50.0, 1.0)))
    p, _ = max_backpressure_bar(m)
    assert p == pytest.approx(
        float(backpressure_bar(HPLC, 1.0, viscosity_mpa_s(0.5, "acetonitrile", 25.0))), rel=1e-9
    )


def test_max_backpressure_at_methanol_viscosity_maximum():
    # 5-95 % methanol in 20 min at 1 mL/min, dwell 1 mL. The pressure peaks when the column
    # holds eluent near the viscosity maximum (~42 % methanol at 25 C), programmed at
    # t = 20 * (0.42 - 0.05) / 0.90 = 8.2 min and reaching mid-column (VD + Vm / 2) / F later.
    m = _method("methanol", ((0.0, 5.0, 1.0), (20.0, 95.0, 1.0)))
    p, t = max_backpressure_bar(m)
    phi_max, eta_max = _maximum("methanol", 25.0)
    t_expected = 20 * (phi_max - 0.05) / 0.90 + (1.0 + void_volume_ml(150, 4.6) / 2) / 1.0
    assert t == pytest.approx(t_expected, abs=0.5)
    assert p == pytest.approx(float(backpressure_bar(HPLC, 1.0, eta_max)), rel=0.02)
    # a flow step doubles the pressure (Darcy) while the composition is held
    m2 = _method(
        "acetonitrile", ((0.0, 50.0, 1.0), (5.0, 50.0, 1.0), (5.1, 50.0, 2.0), (10.0, 50.0, 2.0))
    )
    p2, t2 = max_backpressure_bar(m2)
    assert p2 == pytest.approx(
        2 * float(backpressure_bar(HPLC, 1.0, viscosity_mpa_s(0.5, "acetonitrile", 25.0))), rel=1e-6
    )
    assert t2 >= 5.1


def test_peak_capacity():
    # n_c = 1 + tG / (4 sigma): 20 min gradient, sigma 0.05 min -> 101 (hand arithmetic)
    assert peak_capacity(20.0, 0.05) == pytest.approx(101.0)


# --- HSM classes -------------------------------------------------------------------------


def test_class_hsm_physical_order():
    c18, c8, cn = class_hsm("C18"), class_hsm("C8"), class_hsm("CN")
    # retention-physics.md section 5: C8 lower H and lower kEB than C18 (common practice);
    # cyano phases are the least hydrophobic of the classes (common practice)
    assert c8.H < c18.H and c8.kEB < c18.kEB
    assert cn.H < min(class_hsm(p).H for p in ("C18", "C8", "phenyl", "polar-embedded"))
    assert class_hsm("c18") == c18
    with pytest.raises(MethodError) as err:
        class_hsm("graphite")
    assert "column.phase" in str(err.value)


def test_column_hsm_prefers_own_parameters():
    own = HsmParameters(1.0, 0.01, 0.1, 0.0, 0.2, 0.3, 9.0)
    assert column_hsm(Column("C18", 150, 4.6, 5, hsm=own)) is own
    assert column_hsm(Column("C8", 150, 4.6, 5)) == class_hsm("C8")


@pytest.mark.opendata
def test_class_hsm_matches_open_table():
    root = find_open_data()
    if root is None or not (root / "hsm_columns.tsv").is_file():
        pytest.skip("open-rp data not found (set RETPRED_OPEN_RP or ../shared/datasets/open-rp)")
    raw = pd.read_csv(root / "hsm_columns.tsv", sep="\t")
    label = raw["phase type"].fillna("").str.strip().str.lower()
    groups = {
        "C18": label == "c18",
        "C8": label == "c8",
        "phenyl": label == "phenyl",
        "polar-embedded": label == "ep",
        "CN": label == "cn",
    }
    for phase, mask in groups.items():
        med = raw[mask].median(numeric_only=True)
        got = class_hsm(phase)
        for col, val in (
            ("H", got.H),
            ("S*", got.S),
            ("A", got.A),
            ("B", got.B),
            ("C (pH 2.8)", got.C28),
            ("C (pH 7.0)", got.C70),
            ("EB retention factor", got.kEB),
        ):
            assert val == pytest.approx(med[col], abs=5e-4 * max(1.0, abs(med[col]))), (phase, col)
