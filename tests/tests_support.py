"""Helpers shared by tests (not fixtures)."""

from __future__ import annotations

from pathlib import Path


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


def warming_shift(model, organic):
    """``log kw`` at 50 C minus at 30 C of :data:`WARMING_SMILES` on the C18 class."""
    from retpred.column import class_hsm
    from retpred.model import SystemContext, featurise

    sol = featurise(WARMING_SMILES)
    lk = [model.retention_parameters(sol, SystemContext(
        organic=organic, ph=3.0, temperature_c=t, hsm=class_hsm("C18")))[0] for t in (30, 50)]
    return lk[1] - lk[0]
