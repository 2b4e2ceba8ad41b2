"""What the report says of the models' silicon fidelity: which bias sources were used (ideal
or mirrors), what the analytic device models leave out and what a table technology brings
back, and the length warnings of a calibrated analytic technology for the front's designs.
"""
from __future__ import annotations

from models.validity import ANALYTIC, LENGTH_MARGIN, length_warnings

from ..files.mirrorfile import describe_mirrors
from ..search.runfolder import populations

IDEAL_SOURCES = ("Bias sources are ideal: every bias current (ib_*) and bias resistor is exact, with infinite output "
                 "resistance, no compliance limit, no drift with supply or temperature and no mismatch of its own. "
                 "Any supply or temperature dependence shown comes from the stage alone.")


def bias_sources(study) -> str:
    """One bullet: the ideal-source sentence, or which sources are mirrors and how."""
    mirrors = study.targets.mirrors
    if not any(mirrors.values()):
        return IDEAL_SOURCES
    lines = describe_mirrors(mirrors, study.architectures)
    return ("Bias sources ([mirrors] of the study): " + "; ".join(lines) + ". A mirror delivers "
            "I0 (1 + delta) + (V_across - V_ref) / r_out: its mismatch delta enters the Iq sigma through the same "
            "adjoint as the devices' (the two ends of a shared bias are separate sources), its output resistance "
            "the rest point and so the supply sensitivity. A sized mirror is 1:1 with its own input diode: V_ref is "
            "that diode's VGS, r_out 1/gds of the output device at the bias current, delta Pelgrom's for the pair, "
            "its compliance the output device's VDSsat (checked at rest at every PVT point), and its area 2 W L "
            "counts in area_um2. Sources not listed are ideal.")


def device_limits(study) -> list[str]:
    """Bullets on what the device model kind leaves out, and what the table kind brings back."""
    tech = study.tech
    if tech.model.value not in ANALYTIC:
        return [(f"Devices of {tech.name} come from the user's card tabulated by ngspice at every length, corner "
                 f"and temperature, interpolated between the grid points: length-dependent threshold, DIBL, "
                 f"velocity saturation, mobility degradation and narrow-width effects are the card's. No value is "
                 f"extrapolated outside the tables.")]
    fitted = ", ".join(f"{x * 1e6:.3g} um" for x in tech.fitted_lengths)
    where = (f" {tech.name} was calibrated at L = {fitted}; outside +-{LENGTH_MARGIN * 100:g} % of those lengths "
             f"the fit is not trusted." if tech.fitted_lengths else
             f" {tech.name} records no calibration lengths, so no length warning is given for it.")
    return [(f"What the {tech.model.value} model leaves out: the threshold's dependence on length (roll-off, halo "
            f"implants) and on drain voltage (DIBL), velocity saturation, mobility degradation with gate field and "
            f"narrow-width effects; one threshold and one current factor hold at every length." + where +
            " Replica devices (a loop diode and the device it stands for) match in the model at any lengths; in "
            "silicon only at equal lengths. A table technology (stagefront calibrate --tables) tabulates the card "
            "at every length and brings all of these back.")]


def length_lines(study, table) -> list[str]:
    """The length warnings for the front's designs (none without a calibrated analytic technology)."""
    if not len(table):
        return []
    return length_warnings(study.tech, [d for _, d in populations(table)])
