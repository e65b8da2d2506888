"""Helpers shared by tests (not fixtures)."""

from __future__ import annotations

from pathlib import Path

import numpy as np


def write_system_method(system, path: Path):
    """Write an open-data system's own method as a TOML method file."""
    prog = system.program
    rows = ", ".join(
        f"[{t:.6g}, {100 * p:.6g}, {f:.6g}]"
        for t, p, f in zip(prog.pump_time_min, prog.pump_phi, prog.pump_flow_ml_min,
                           strict=True)
    )
    path.write_text(
        f'[column]\nphase = "{system.phase}"\nlength_mm = {system.length_mm}\n'
        f"inner_diameter_mm = {system.inner_diameter_mm}\nparticle_um = {system.particle_um}\n"
        f"dead_time_min = {prog.dead_time_min:.6g}\n"
        f'[mobile_phase]\norganic = "{system.organic}"\nph = {system.ph}\n'
        f"temperature_c = {system.temperature_c}\n"
        f"[gradient]\nflow_ml_min = {system.flow_ml_min}\n"
        f"dwell_volume_ml = {prog.dwell_volume_ml}\nprogram = [{rows}]\n"
    )


WARMING_SMILES = [
    # uracil, paracetamol, caffeine, benzoic acid, toluene, pyrene: log P from about -1 to 5
    "O=c1cc[nH]c(=O)[nH]1", "CC(=O)Nc1ccc(O)cc1", "Cn1cnc2c1c(=O)n(C)c(=O)n2C",
    "OC(=O)c1ccccc1", "Cc1ccccc1", "c1cc2ccc3cccc4ccc(c1)c2c34",
]


def class_log_kw(model, solutes, phase, organic, temperature_c=30.0, ph=3.0):
    """Predicted ``log kw`` of ``solutes`` on the class-median column of ``phase``."""
    from retpred.column import class_hsm
    from retpred.model import SystemContext

    ctx = SystemContext(organic=organic, ph=ph, temperature_c=temperature_c,
                        hsm=class_hsm(phase))
    return model.retention_parameters(solutes, ctx)[0]


def practice_warming_bounds(t_low_c=30.0, t_high_c=50.0):
    """``log kw`` change from ``t_low_c`` to ``t_high_c`` at 2 % and at 1 % less k per
    degree (common practice, from memory: reversed-phase retention falls by roughly 1-2 %
    of k per degree as the column warms)."""
    dt = t_high_c - t_low_c
    return dt * np.log10(0.98), dt * np.log10(0.99)


def warming_shift(model, organic):
    """``log kw`` at 50 C minus at 30 C of :data:`WARMING_SMILES` on the C18 class."""
    from retpred.model import featurise

    sol = featurise(WARMING_SMILES)
    return (class_log_kw(model, sol, "C18", organic, temperature_c=50.0)
            - class_log_kw(model, sol, "C18", organic, temperature_c=30.0))
